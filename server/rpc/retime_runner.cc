#include "server/rpc/retime_runner.h"

#include <algorithm>
#include <chrono>
#include <cstdlib>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/rpc/auth.h"

namespace tickmark::rpc {

namespace v1 = tickmark::v1;

namespace {

// The outcome of an event whose live real-time mapping was kept
// (RetimeCollector::EventRef::realtime).
constexpr char kRealtimeKept[] = "realtime";

// Nearest-rank quantile of unsorted values (0 for none).
int64_t Quantile(std::vector<int64_t> v, double q) {
  if (v.empty()) return 0;
  std::sort(v.begin(), v.end());
  const size_t i = static_cast<size_t>(q * static_cast<double>(v.size() - 1) + 0.5);
  return v[std::min(i, v.size() - 1)];
}

bool StartsWith(const std::string& s, const char* prefix) { return s.rfind(prefix, 0) == 0; }

}  // namespace

RetimeCollector::Clock& RetimeCollector::Current(const std::string& client_id) {
  auto it = current_.find(client_id);
  if (it == current_.end()) {
    // A client seen before its connect record (not written by this server):
    // one clock until it connects.
    clocks_.push_back(Clock{client_id, {}, {}, {}});
    it = current_.emplace(client_id, clocks_.size() - 1).first;
  }
  return clocks_[it->second];
}

void RetimeCollector::AddEvent(const std::string& client_id, uint64_t sequence, const char* kind,
                               int64_t client_ns, int64_t live_ns, int64_t uncertainty_ns,
                               int64_t arrival_ns, bool realtime) {
  Clock& c = Current(client_id);
  c.events.push_back(RetimeEvent{ClientTime::FromNanos(client_ns), SessionTime::FromNanos(live_ns),
                                 Duration::Nanos(uncertainty_ns), c.probes.size(),
                                 SessionTime::FromNanos(arrival_ns)});
  c.refs.push_back(EventRef{sequence, kind, realtime});
}

void RetimeCollector::Add(const v1::Record& r) {
  if (r.has_client_event()) {
    if (r.client_event().event() == v1::ClientEvent::KIND_CONNECTED) {
      const std::string& id = r.client_event().client().client_id();
      clocks_.push_back(Clock{id, {}, {}, {}});
      current_[id] = clocks_.size() - 1;
    }
  } else if (r.has_probe()) {
    const v1::Probe& p = r.probe();
    const bool candidate =
        !p.accepted() &&
        p.reject_reason() == ProbeVerdictName(ProbeVerdict::kRejectedUnconfirmedJump);
    if (!p.accepted() && !candidate) return;  // impossible timestamps: never used
    RetimeProbe probe;
    probe.t = ProbeTimestamps{
        SessionTime::FromNanos(p.t1_session_ns()), ClientTime::FromNanos(p.t2_client_ns()),
        ClientTime::FromNanos(p.t3_client_ns()), SessionTime::FromNanos(p.t4_session_ns())};
    probe.candidate = candidate;
    Current(p.client_id()).probes.push_back(probe);
  } else if (r.has_clock_model()) {
    // The live model restarted (a confirmed clock jump) at the probe whose
    // T4 the update was written at (IngestReactor::AddProbe).
    const v1::ClockModelUpdate& u = r.clock_model();
    if (!StartsWith(u.reason(), "restart")) return;
    Clock& c = Current(u.client_id());
    for (auto it = c.probes.rbegin(); it != c.probes.rend(); ++it) {
      if (!it->candidate && it->t.t4.nanos() == r.written_session_ns()) {
        it->restart = true;
        break;
      }
    }
  } else if (r.has_feedback()) {
    const v1::Feedback& f = r.feedback();
    AddEvent(f.client_id(), r.sequence(), "feedback", f.event_source_ns(), f.event_session_ns(),
             f.uncertainty_ns(), f.arrival_session_ns(),
             f.time_source() == v1::TIME_SOURCE_REALTIME);
  } else if (r.has_step()) {
    const v1::Step& s = r.step();
    const bool realtime = s.time_source() == v1::TIME_SOURCE_REALTIME;
    AddEvent(s.client_id(), r.sequence(), "step_start", s.start_agent_ns(), s.start_session_ns(),
             s.uncertainty_ns(), s.arrival_session_ns(), realtime);
    if (s.end_agent_ns() != 0) {
      AddEvent(s.client_id(), r.sequence(), "step_end", s.end_agent_ns(), s.end_session_ns(),
               s.uncertainty_ns(), s.arrival_session_ns(), realtime);
    }
  }
}

RetimeResult ComputeRetime(const RetimeCollector& collected, const RetimeOptions& options) {
  RetimeResult result;
  v1::RetimeResponse& sum = result.summary;
  std::vector<int64_t> moved, live_u, retimed_u;
  for (const RetimeCollector::Clock& c : collected.clocks()) {
    if (c.events.empty()) continue;
    sum.set_clocks(sum.clocks() + 1);
    const std::vector<RetimedTime> out = RetimeClock(c.probes, c.events, options);
    for (size_t i = 0; i < out.size(); ++i) {
      const RetimeEvent& e = c.events[i];
      RetimedTime t = out[i];
      // A live real-time mapping stays unless the probes bound it tighter
      // (EventRef::realtime).
      const bool keep_realtime = c.refs[i].realtime && (t.outcome != RetimeOutcome::kRetimed ||
                                                        e.live_uncertainty <= t.uncertainty);
      if (keep_realtime) t = RetimedTime{e.live, e.live_uncertainty, t.outcome, 0};
      ledger::DerivedTimeRow row;
      row.sequence = c.refs[i].sequence;
      row.kind = c.refs[i].kind;
      row.client_id = c.client_id;
      row.event_session_ns = t.session.nanos();
      row.uncertainty_ns = t.uncertainty.nanos();
      row.live_session_ns = e.live.nanos();
      row.live_uncertainty_ns = e.live_uncertainty.nanos();
      const char* outcome = keep_realtime ? kRealtimeKept : RetimeOutcomeName(t.outcome);
      row.outcome = outcome;
      row.probes = static_cast<uint32_t>(std::max(t.probes, 0));
      result.rows.push_back(std::move(row));
      sum.set_events(sum.events() + 1);
      if (keep_realtime || t.outcome != RetimeOutcome::kRetimed) {
        (*sum.mutable_kept())[outcome] += 1;
        continue;
      }
      sum.set_retimed(sum.retimed() + 1);
      moved.push_back((t.session - e.live) < Duration::Zero() ? (e.live - t.session).nanos()
                                                              : (t.session - e.live).nanos());
      live_u.push_back(e.live_uncertainty.nanos());
      retimed_u.push_back(t.uncertainty.nanos());
      if (t.uncertainty < e.live_uncertainty) sum.set_narrower(sum.narrower() + 1);
    }
  }
  sum.set_moved_p50_ns(Quantile(moved, 0.5));
  sum.set_moved_p95_ns(Quantile(moved, 0.95));
  sum.set_moved_max_ns(Quantile(moved, 1.0));
  sum.set_live_uncertainty_p50_ns(Quantile(live_u, 0.5));
  sum.set_live_uncertainty_p95_ns(Quantile(live_u, 0.95));
  sum.set_retimed_uncertainty_p50_ns(Quantile(retimed_u, 0.5));
  sum.set_retimed_uncertainty_p95_ns(Quantile(retimed_u, 0.95));
  return result;
}

absl::StatusOr<v1::RetimeResponse> RunRetime(
    ledger::Ledger* ledger, const std::string& session_id, const RetimeOptions& options,
    const std::function<void(uint64_t, uint64_t)>& progress,
    const std::function<bool()>& cancelled) {
  if (absl::Status s = ledger->GetSession(session_id).status(); !s.ok()) return s;
  const uint64_t total = ledger->CommittedSequence(session_id);
  RetimeCollector collector;
  std::string head_hash;
  auto last_report = std::chrono::steady_clock::now();
  for (uint64_t next = 1; next <= total;) {
    if (cancelled()) return absl::CancelledError("retiming cancelled");
    auto chunk = ledger->Read(session_id, next, 4096);
    if (!chunk.ok()) return chunk.status();
    if (chunk->empty()) break;
    for (const v1::Record& r : *chunk) {
      if (r.sequence() > total) break;
      collector.Add(r);
      if (r.sequence() == total) head_hash = r.hash();
    }
    next = chunk->back().sequence() + 1;
    if (std::chrono::steady_clock::now() - last_report > std::chrono::milliseconds(200)) {
      progress(std::min(next - 1, total), total);
      last_report = std::chrono::steady_clock::now();
    }
  }
  RetimeResult result = ComputeRetime(collector, options);
  if (result.rows.empty()) {
    return absl::FailedPreconditionError(
        Cat("session ", session_id, " has no feedback or steps to retime"));
  }
  ledger::TimeSetRow set;
  set.session_id = session_id;
  set.method = kRetimeMethod;
  set.parameters = DescribeRetimeOptions(options);
  set.through_sequence = total;
  set.head_hash = head_hash;
  set.events = result.summary.events();
  set.retimed = result.summary.retimed();
  absl::Status stored = absl::UnknownError("no id");
  for (int attempt = 0; attempt < 4; ++attempt) {  // a random id may be taken
    auto hex = RandomHex(4);
    if (!hex.ok()) return hex.status();
    set.id = "ts-" + *hex;
    stored = ledger->PutTimeSet(set, result.rows);
    if (!absl::IsAlreadyExists(stored)) break;
  }
  if (!stored.ok()) return stored;
  v1::RetimeResponse out = std::move(result.summary);
  out.set_done(total);
  out.set_total(total);
  out.set_finished(true);
  out.set_time_set(set.id);
  out.set_through_sequence(total);
  TM_LOG(kInfo) << "time set " << set.id << " of " << session_id << ": " << out.retimed() << " of "
                << out.events() << " event times retimed";
  return out;
}

absl::StatusOr<DerivedTimes> LoadDerivedTimes(ledger::Ledger* ledger, const std::string& session_id,
                                              const std::string& id) {
  DerivedTimes out;
  if (id == "latest") {
    auto sets = ledger->ListTimeSets(session_id);
    if (!sets.ok()) return sets.status();
    if (sets->empty()) {
      return absl::NotFoundError(
          Cat("session ", session_id, " has no time set (make one with tickmark retime)"));
    }
    out.set = sets->front();
  } else {
    auto set = ledger->GetTimeSet(id);
    if (!set.ok()) return set.status();
    if (set->session_id != session_id) {
      // As for an unknown id: never reveal another session's sets.
      return absl::NotFoundError(Cat("no time set '", id, "' in session ", session_id));
    }
    out.set = *set;
  }
  auto rows = ledger->ReadDerivedTimes(out.set.id);
  if (!rows.ok()) return rows.status();
  for (const ledger::DerivedTimeRow& row : *rows) {
    DerivedTimes::Times& t = out.by_sequence[row.sequence];
    if (row.kind == "feedback") {
      t.event_ns = row.event_session_ns;
      t.event_uncertainty_ns = row.uncertainty_ns;
      t.has_event = true;
    } else if (row.kind == "step_start") {
      t.start_ns = row.event_session_ns;
      t.start_uncertainty_ns = row.uncertainty_ns;
      t.has_start = true;
    } else if (row.kind == "step_end") {
      t.end_ns = row.event_session_ns;
      t.has_end = true;
    }
  }
  return out;
}

bool ApplyDerivedTimes(const DerivedTimes& times, v1::Record* record) {
  auto it = times.by_sequence.find(record->sequence());
  if (it == times.by_sequence.end()) return false;
  const DerivedTimes::Times& t = it->second;
  if (record->has_feedback() && t.has_event) {
    record->mutable_feedback()->set_event_session_ns(t.event_ns);
    record->mutable_feedback()->set_uncertainty_ns(t.event_uncertainty_ns);
    return true;
  }
  if (record->has_step() && t.has_start) {
    v1::Step* s = record->mutable_step();
    s->set_start_session_ns(t.start_ns);
    s->set_uncertainty_ns(t.start_uncertainty_ns);
    if (t.has_end && s->end_session_ns() != 0) s->set_end_session_ns(t.end_ns);
    return true;
  }
  return false;
}

}  // namespace tickmark::rpc

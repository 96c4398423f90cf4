#include "server/rpc/session_hub.h"

#include <time.h>

#include <algorithm>
#include <fstream>

#include "server/audit/receipt.h"
#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/ops/server_metrics.h"
#include "server/rpc/auth.h"
#include "server/rpc/status.h"

namespace tickmark::rpc {

using tickmark::v1::Ack;
using tickmark::v1::Record;
namespace v1 = tickmark::v1;

std::string ReadBootId() {
  std::ifstream in("/proc/sys/kernel/random/boot_id");
  std::string id;
  std::getline(in, id);
  return id;
}

int64_t SystemUtcNowNanos() {
  timespec ts{};
  clock_gettime(CLOCK_REALTIME, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 + ts.tv_nsec;
}

SessionRuntime::SessionRuntime(const ledger::SessionRow& row, const MonotonicSource* mono,
                               ledger::Ledger* ledger)
    : id_(row.id),
      clock_(row.utc_anchor_ns, row.mono_anchor_ns, mono),
      ledger_(ledger),
      open_(row.open),
      pin_kernels_(row.pin_kernels) {}

bool SessionRuntime::open() const {
  std::lock_guard<std::mutex> lock(mu_);
  return open_;
}

Ack ErrorAck(uint64_t client_sequence, const absl::Status& s) {
  Ack ack;
  ack.set_client_sequence(client_sequence);
  ack.set_code(static_cast<int32_t>(s.code()));
  ack.set_message(std::string(s.message()));
  return ack;
}

namespace {

Ack DuplicateAck(uint64_t cseq, uint64_t sequence) {
  Ack ack;
  ack.set_client_sequence(cseq);
  ack.set_sequence(sequence);
  ack.set_duplicate(true);
  ack.set_message("duplicate: already stored");
  return ack;
}

}  // namespace

std::optional<std::vector<SessionRuntime::AckCallback>> SessionRuntime::FinishPending(
    const std::string& client_id, uint64_t cseq,
    const std::shared_ptr<PendingClientRecord>& pending) {
  std::lock_guard<std::mutex> lock(mu_);
  if (pending->finished) return std::nullopt;
  pending->finished = true;
  auto& in_flight = clients_[client_id].in_flight;
  if (auto it = in_flight.find(cseq); it != in_flight.end() && it->second == pending) {
    in_flight.erase(it);
  }
  return std::move(pending->copies);
}

void SessionRuntime::AnswerPending(const std::string& client_id, uint64_t cseq,
                                   const std::shared_ptr<PendingClientRecord>& pending,
                                   const AckCallback& done, const Ack& ack) {
  auto copies = FinishPending(client_id, cseq, pending);
  if (!copies) return;
  if (done) done(ack);
  // A copy of a stored record is a duplicate of it; a copy of one that
  // failed was not stored either and gets the same error.
  const Ack copy_ack = ack.code() == 0 ? DuplicateAck(cseq, ack.sequence()) : ack;
  for (const AckCallback& copy : *copies) copy(copy_ack);
}

void SessionRuntime::AppendClientRecord(Record record, AckCallback done) {
  auto key = ledger::ClientKeyOf(record);
  const std::string client_id = key ? key->first : std::string();
  const uint64_t cseq = key ? key->second : 0;
  int64_t event_ns = 0, uncertainty_ns = 0;
  if (record.has_feedback()) {
    event_ns = record.feedback().event_session_ns();
    uncertainty_ns = record.feedback().uncertainty_ns();
  } else if (record.has_step()) {
    event_ns = record.step().start_session_ns();
    uncertainty_ns = record.step().uncertainty_ns();
  } else if (record.has_calibration_event()) {
    event_ns = record.calibration_event().at_session_ns();
    uncertainty_ns = record.calibration_event().uncertainty_ns();
  } else if (record.has_sync_pulse()) {
    event_ns = record.sync_pulse().event_session_ns();
    uncertainty_ns = record.sync_pulse().uncertainty_ns();
  }

  // Claim the key under the lock; every ledger call below is made without
  // it, because a ledger may run the commit callback (which takes the lock)
  // on this thread before Append returns.
  auto pending = std::make_shared<PendingClientRecord>();
  bool loaded = false;
  uint64_t highest = 0;
  {
    std::unique_lock<std::mutex> lock(mu_);
    if (!open_) {
      lock.unlock();
      return done(ErrorAck(cseq, absl::FailedPreconditionError("session is closed")));
    }
    ClientSeqState& state = clients_[client_id];
    if (auto it = state.in_flight.find(cseq); it != state.in_flight.end()) {
      // The same message is being looked up or stored right now: this copy
      // is answered when that one finishes, with its committed sequence.
      it->second->copies.push_back(std::move(done));
      return;
    }
    state.in_flight[cseq] = pending;
    loaded = state.loaded;
    highest = state.highest;
    state.highest = std::max(state.highest, cseq);
  }

  // A resend of something committed earlier? Nothing else can store this
  // key meanwhile: we own it until FinishPending.
  bool maybe_resend = cseq <= highest;
  if (!loaded) {
    auto last = ledger_->LastClientSequence(id_, client_id);
    if (!last.ok()) return AnswerPending(client_id, cseq, pending, done, ErrorAck(cseq, last.status()));
    {
      std::lock_guard<std::mutex> lock(mu_);
      ClientSeqState& state = clients_[client_id];
      state.highest = std::max(state.highest, *last);
      state.loaded = true;
    }
    maybe_resend = maybe_resend || cseq <= *last;
  }
  if (maybe_resend) {
    auto found = ledger_->FindClientSequence(id_, client_id, cseq);
    if (!found.ok()) return AnswerPending(client_id, cseq, pending, done, ErrorAck(cseq, found.status()));
    if (found->has_value()) {
      // Committed already. Answer after a barrier so that this ack does not
      // overtake the acks of what the client sent before it.
      const uint64_t seq = **found;
      ledger_->Barrier([this, client_id, cseq, pending, done, seq] {
        AnswerPending(client_id, cseq, pending, done, DuplicateAck(cseq, seq));
      });
      return;
    }
  }

  std::vector<Record> batch;
  batch.push_back(std::move(record));
  auto first = ledger_->Append(
      id_, std::move(batch),
      [this, done, client_id, cseq, pending, event_ns, uncertainty_ns](
          const absl::Status& s, const std::vector<Record>& committed) {
        Ack ack;
        if (s.ok() && !committed.empty()) {
          ack.set_client_sequence(cseq);
          // The committed sequence: the one Append returned is provisional.
          ack.set_sequence(committed.front().sequence());
          ack.set_event_session_ns(event_ns);
          ack.set_uncertainty_ns(uncertainty_ns);
        } else {
          ack = ErrorAck(cseq, s.ok() ? absl::InternalError("ledger committed no record") : s);
        }
        AnswerPending(client_id, cseq, pending, done, ack);
        Fanout(s, committed);
      });
  // A ledger failing synchronously may or may not have called back; the
  // pending record is answered once either way.
  if (!first.ok()) AnswerPending(client_id, cseq, pending, done, ErrorAck(cseq, first.status()));
}

absl::StatusOr<uint64_t> SessionRuntime::AppendRecord(
    Record record, std::function<void(const absl::Status&, const Record&)> done) {
  std::vector<Record> batch;
  batch.push_back(std::move(record));
  return ledger_->Append(id_, std::move(batch),
                         [this, done](const absl::Status& s, const std::vector<Record>& committed) {
                           // A kernel setting counts as soon as it is committed, before
                           // the caller hears so: a trainer who joins right after an
                           // admin's SetKernel must not get their calibration on top.
                           // (Credit notes it again later; noting is idempotent.)
                           if (s.ok()) NoteKernel(committed.front());
                           if (done) done(s, committed.front());
                           Fanout(s, committed);
                         });
}

absl::StatusOr<uint64_t> SessionRuntime::LastClientSequence(const std::string& client_id) {
  bool loaded = false;
  {
    std::lock_guard<std::mutex> lock(mu_);
    loaded = clients_[client_id].loaded;
  }
  // The read is made without the lock (see AppendClientRecord); loading
  // twice is harmless, the highest wins.
  std::optional<uint64_t> last;
  if (!loaded) {
    auto read = ledger_->LastClientSequence(id_, client_id);
    if (!read.ok()) return read.status();
    last = *read;
  }
  std::lock_guard<std::mutex> lock(mu_);
  ClientSeqState& state = clients_[client_id];
  if (last) {
    state.highest = std::max(state.highest, *last);
    state.loaded = true;
  }
  // Only committed ones count for the client's resend queue.
  uint64_t committed = state.highest;
  if (!state.in_flight.empty()) committed = std::min(committed, state.in_flight.begin()->first - 1);
  return committed;
}

void SessionRuntime::Fanout(const absl::Status& status, const std::vector<Record>& records) {
  if (!status.ok()) return;
  {
    std::lock_guard<std::mutex> lock(streams_mu_);
    for (RecordSink* sink : sinks_) sink->OnCommitted(records);
  }
  Credit(records);
}

Duration SessionRuntime::allowed_lateness() const {
  return Duration::Nanos(lateness_ns_.load());
}

std::string SessionRuntime::default_kernel() const {
  std::lock_guard<std::mutex> lock(kernel_mu_);
  return default_kernel_;
}

bool SessionRuntime::HasKernelFor(const std::string& trainer) const {
  std::lock_guard<std::mutex> lock(kernel_mu_);
  return kernel_trainers_.count(trainer) > 0;
}

bool SessionRuntime::ClaimAutoKernel(const std::string& trainer) {
  std::lock_guard<std::mutex> lock(kernel_mu_);
  return kernel_trainers_.insert(trainer).second;
}

void SessionRuntime::NoteKernel(const Record& r) {
  if (r.has_kernel() && !r.kernel().trainer().empty()) {
    std::lock_guard<std::mutex> lock(kernel_mu_);
    kernel_trainers_.insert(r.kernel().trainer());
  }
  if (r.has_kernel() && r.kernel().trainer().empty()) {
    lateness_ns_.store(r.kernel().allowed_lateness_ns());
    std::lock_guard<std::mutex> lock(kernel_mu_);
    default_kernel_ = r.kernel().description();
  }
}

void SessionRuntime::Credit(const std::vector<Record>& records) {
  std::vector<Record> derived;
  {
    std::lock_guard<std::mutex> lock(credit_mu_);
    for (const Record& r : records) {
      NoteKernel(r);
      credit_.Feed(r, &derived);
    }
  }
  if (derived.empty()) return;
  // Derived records get their own sequences after what is queued; their
  // commit comes back through Fanout (to subscribers; the engine skips them).
  auto s = ledger_->Append(id_, std::move(derived),
                           [this](const absl::Status& st, const std::vector<Record>& committed) {
                             Fanout(st, committed);
                           });
  if (!s.ok()) {
    TM_LOG(kError) << "session " << id_ << ": credit not written: " << s.status().message();
  }
}

absl::Status SessionRuntime::FinishCredit(int64_t end_ns) {
  std::vector<Record> derived;
  {
    std::lock_guard<std::mutex> lock(credit_mu_);
    credit_.Finish(end_ns, &derived);
  }
  if (derived.empty()) return absl::OkStatus();
  auto s = ledger_->Append(id_, std::move(derived),
                           [this](const absl::Status& st, const std::vector<Record>& committed) {
                             Fanout(st, committed);
                           });
  return s.ok() ? absl::OkStatus() : s.status();
}

absl::Status SessionRuntime::Rebuild() {
  std::vector<Record> derived;
  std::set<std::tuple<int, uint64_t, uint64_t>> stored;
  // The engine's lock covers only the replay; the Append below is made
  // without it, like every ledger call that can call back.
  std::unique_lock<std::mutex> lock(credit_mu_);
  for (uint64_t next = 1;;) {
    auto chunk = ledger_->Read(id_, next, 4096);
    if (!chunk.ok()) return chunk.status();
    if (chunk->empty()) break;
    for (const Record& r : *chunk) {
      NoteKernel(r);
      if (CreditDriver::IsInput(r)) {
        credit_.Feed(r, &derived);
      } else {
        stored.insert(CreditDriver::DerivedKey(r));
      }
    }
    next = chunk->back().sequence() + 1;
  }
  lock.unlock();
  std::vector<Record> missing;
  for (Record& r : derived) {
    if (!stored.count(CreditDriver::DerivedKey(r))) missing.push_back(std::move(r));
  }
  if (missing.empty()) return absl::OkStatus();
  TM_LOG(kInfo) << "session " << id_ << ": writing " << missing.size()
                << " derived records lost in a stop";
  auto s = ledger_->Append(id_, std::move(missing),
                           [this](const absl::Status& st, const std::vector<Record>& committed) {
                             std::lock_guard<std::mutex> l(streams_mu_);
                             if (st.ok()) {
                               for (RecordSink* sink : sinks_) sink->OnCommitted(committed);
                             }
                           });
  return s.ok() ? absl::OkStatus() : s.status();
}

void SessionRuntime::AddStream(StreamHandle* stream) {
  std::lock_guard<std::mutex> lock(streams_mu_);
  streams_.insert(stream);
}
void SessionRuntime::RemoveStream(StreamHandle* stream) {
  std::lock_guard<std::mutex> lock(streams_mu_);
  streams_.erase(stream);
}
size_t SessionRuntime::StreamCount() {
  std::lock_guard<std::mutex> lock(streams_mu_);
  return streams_.size();
}
std::vector<v1::ClientClock> SessionRuntime::Clocks() {
  const SessionTime now = Now();
  std::vector<v1::ClientClock> out;
  {
    std::lock_guard<std::mutex> lock(streams_mu_);
    for (StreamHandle* s : streams_) {
      if (std::optional<v1::ClientClock> c = s->Clock(now)) out.push_back(*std::move(c));
    }
  }
  std::sort(out.begin(), out.end(), [](const v1::ClientClock& a, const v1::ClientClock& b) {
    return a.client_id() < b.client_id();
  });
  return out;
}
void SessionRuntime::AddSink(RecordSink* sink) {
  std::lock_guard<std::mutex> lock(streams_mu_);
  sinks_.insert(sink);
}
void SessionRuntime::RemoveSink(RecordSink* sink) {
  std::lock_guard<std::mutex> lock(streams_mu_);
  sinks_.erase(sink);
}

void SessionRuntime::MarkClosed(const absl::Status& why) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    open_ = false;
  }
  const grpc::Status status = ToGrpc(why);
  std::lock_guard<std::mutex> lock(streams_mu_);
  for (StreamHandle* s : streams_) s->End(status);
}

void SessionRuntime::EndStreams(const absl::Status& why) {
  const grpc::Status status = ToGrpc(why);
  std::lock_guard<std::mutex> lock(streams_mu_);
  for (StreamHandle* s : streams_) s->End(status);
}

void SessionRuntime::EndStreamsOf(const std::string& token_id, const absl::Status& why) {
  const grpc::Status status = ToGrpc(why);
  std::lock_guard<std::mutex> lock(streams_mu_);
  for (StreamHandle* s : streams_) {
    if (s->token_id() == token_id) s->End(status);
  }
}

SessionHub::SessionHub(ledger::Ledger* ledger, const MonotonicSource* mono,
                       int64_t (*utc_now_ns)(), Options options)
    : ledger_(ledger),
      mono_(mono),
      utc_now_ns_(utc_now_ns),
      boot_id_(ReadBootId()),
      options_(std::move(options)) {
  // Several instances on one database: a session whose lease this instance
  // lost is dropped here, and its streams end UNAVAILABLE naming the owner,
  // so clients reconnect there and resend what was not acknowledged.
  ledger_->SetLeaseLostHandler([this](const std::string& session, const std::string& owner) {
    OnLeaseLost(session, owner);
  });
  ledger_->SetRemoteCommitHandler([this](const std::string& session, uint64_t) {
    std::lock_guard<std::mutex> lock(watch_mu_);
    auto it = watchers_.find(session);
    if (it == watchers_.end()) return;
    for (RecordSink* sink : it->second) sink->OnCommitted({});
  });
}

SessionHub::~SessionHub() {
  ledger_->SetLeaseLostHandler({});
  ledger_->SetRemoteCommitHandler({});
}

void SessionHub::Watch(const std::string& id, RecordSink* sink) {
  std::lock_guard<std::mutex> lock(watch_mu_);
  watchers_[id].insert(sink);
}

void SessionHub::Unwatch(const std::string& id, RecordSink* sink) {
  std::lock_guard<std::mutex> lock(watch_mu_);
  auto it = watchers_.find(id);
  if (it == watchers_.end()) return;
  it->second.erase(sink);
  if (it->second.empty()) watchers_.erase(it);
}

// The lease gauges of /metrics (docs/operations.md); a ledger without leases
// (token 0, SQLite) shows none.
void SessionHub::NoteLease(const std::string& id, const ledger::SessionLease& lease) {
  if (lease.token != 0) ops::SetSessionLease(id, lease.owned, lease.token);
}

void SessionHub::OnLeaseLost(const std::string& id, const std::string& owner) {
  ops::SetSessionLease(id, false, 0);
  std::shared_ptr<SessionRuntime> runtime;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (auto it = sessions_.find(id); it != sessions_.end()) {
      runtime = std::move(it->second);
      sessions_.erase(it);
    }
    owners_[id] = owner;
  }
  if (runtime) {
    runtime->EndStreams(absl::UnavailableError(
        Cat("session ", id, " moved to another instance",
            owner.empty() ? std::string() : Cat(" (", owner, ")"), "; reconnect")));
  }
}

std::string SessionHub::OwnerHint(const std::string& id) {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = owners_.find(id);
  return it == owners_.end() ? std::string() : it->second;
}

absl::Status SessionHub::NotOwnedError(const std::string& id, const std::string& owner) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    owners_[id] = owner;
  }
  return absl::UnavailableError(Cat("session ", id, " is served by another instance",
                                    owner.empty() ? std::string() : Cat(" at ", owner),
                                    "; reconnect there"));
}

absl::StatusOr<std::shared_ptr<SessionRuntime>> SessionHub::Get(const std::string& id) {
  std::unique_lock<std::mutex> lock(mu_);
  if (auto it = sessions_.find(id); it != sessions_.end()) return it->second;
  auto row = ledger_->GetSession(id);
  if (!row.ok()) return row.status();
  // Only the lease holder writes a session; taking the lease also gives the
  // ledger the session's head as the database holds it (another instance
  // may have written it), and Rebuild below replays the rest from there.
  auto lease = ledger_->AcquireSession(id);
  if (!lease.ok()) return lease.status();
  NoteLease(id, *lease);
  if (!lease->owned) {
    lock.unlock();
    return NotOwnedError(id, lease->owner_address);
  }
  owners_.erase(id);
  bool reanchored = false;
  if (row->boot_id != boot_id_) {
    // The monotonic anchor belongs to an earlier boot: continue session time
    // from UTC now (docs/architecture.md §4: the wall clock is read only at anchoring).
    row->utc_anchor_ns = utc_now_ns_();
    row->mono_anchor_ns = mono_->NowNanos();
    row->boot_id = boot_id_;
    if (absl::Status s = ledger_->ReanchorSession(id, row->utc_anchor_ns, row->mono_anchor_ns,
                                                  boot_id_);
        !s.ok()) {
      return s;
    }
    reanchored = true;
  }
  auto runtime = std::make_shared<SessionRuntime>(*row, mono_, ledger_);
  // Loading stays under the hub lock so that a session is replayed (and its
  // missing derived records written) once; no ledger callback takes it.
  if (absl::Status s = runtime->Rebuild(); !s.ok()) return s;
  sessions_[id] = runtime;
  lock.unlock();
  if (reanchored && row->open) {
    Record r;
    r.set_written_session_ns(runtime->Now().nanos());
    r.mutable_session_event()->set_event(tickmark::v1::SessionEvent::KIND_REANCHORED);
    r.mutable_session_event()->set_detail("monotonic clock reset (reboot); re-anchored to UTC");
    runtime->AppendRecord(std::move(r)).IgnoreError();
    TM_LOG(kWarning) << "session " << id << " re-anchored to UTC after a reboot";
  }
  return runtime;
}

std::shared_ptr<SessionRuntime> SessionHub::Find(const std::string& id) {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = sessions_.find(id);
  return it == sessions_.end() ? nullptr : it->second;
}

absl::StatusOr<std::shared_ptr<SessionRuntime>> SessionHub::Create(const std::string& title,
                                                                   const std::string& study,
                                                                   const std::string& kernel,
                                                                   bool pin_kernels,
                                                                   const StudyPart& study_part) {
  DelayKernel k = options_.default_kernel;
  if (!kernel.empty()) {
    auto parsed = ParseKernel(kernel);
    if (!parsed.ok()) return parsed.status();
    k = *parsed;
  }
  auto id = RandomHex(4);
  if (!id.ok()) return id.status();
  ledger::SessionRow row;
  row.id = "s-" + *id;
  row.title = title;
  row.study = study;
  row.utc_anchor_ns = utc_now_ns_();
  row.mono_anchor_ns = mono_->NowNanos();
  row.opened_session_ns = row.utc_anchor_ns;
  row.boot_id = boot_id_;
  row.pin_kernels = pin_kernels;
  row.condition = study_part.condition;
  row.participants = study_part.participants;
  row.chain_version = ledger::kChainVersion;
  if (absl::Status s = ledger_->CreateSession(row); !s.ok()) return s;
  auto lease = ledger_->AcquireSession(row.id);
  if (lease.ok()) NoteLease(row.id, *lease);
  if (!lease.ok() || !lease->owned) {
    return lease.ok() ? absl::UnavailableError(Cat("session ", row.id, " was taken at once"))
                      : lease.status();
  }
  auto runtime = std::make_shared<SessionRuntime>(row, mono_, ledger_);
  {
    std::lock_guard<std::mutex> lock(mu_);
    sessions_[row.id] = runtime;
  }
  Record r;
  r.set_written_session_ns(row.opened_session_ns);
  r.mutable_session_event()->set_event(tickmark::v1::SessionEvent::KIND_OPENED);
  r.mutable_session_event()->set_detail(title);
  if (auto s = runtime->AppendRecord(std::move(r)); !s.ok()) return s.status();
  // The session default kernel: the first thing the credit engine reads.
  Record ks;
  ks.set_written_session_ns(row.opened_session_ns);
  v1::KernelSetting* setting = ks.mutable_kernel();
  *setting->mutable_kernel() = KernelToProto(k);
  setting->set_weight(1.0);
  setting->set_description(k.Describe());
  setting->set_author("session default");
  setting->set_allowed_lateness_ns(study_part.allowed_lateness_ns > 0
                                       ? study_part.allowed_lateness_ns
                                       : options_.allowed_lateness.nanos());
  if (auto s = runtime->AppendRecord(std::move(ks)); !s.ok()) return s.status();
  return runtime;
}

absl::Status SessionHub::Close(const std::string& id) {
  auto runtime = Get(id);
  if (!runtime.ok()) return runtime.status();
  if (!(*runtime)->open()) return absl::FailedPreconditionError(Cat("session ", id, " is already closed"));
  const int64_t now = (*runtime)->Now().nanos();
  (*runtime)->MarkClosed(absl::FailedPreconditionError(Cat("session ", id, " was closed")));
  // Everything accepted so far is committed and credited; then the final
  // labels, then the "closed" record, so followers that stop at it miss none.
  if (absl::Status s = ledger_->Flush(); !s.ok()) return s;
  if (absl::Status s = (*runtime)->FinishCredit(now); !s.ok()) return s;
  Record r;
  r.set_written_session_ns(now);
  r.mutable_session_event()->set_event(tickmark::v1::SessionEvent::KIND_CLOSED);
  if (auto s = (*runtime)->AppendRecord(std::move(r)); !s.ok()) return s.status();
  if (absl::Status s = ledger_->Flush(); !s.ok()) return s;
  if (absl::Status s = ledger_->CloseSession(id, now); !s.ok()) return s;
  if (!options_.receipt_key) return absl::OkStatus();
  // The receipt: what the chain held at the close, signed (docs/audit.md).
  const uint64_t last = ledger_->CommittedSequence(id);
  auto head = ledger_->Read(id, last, 1);
  if (!head.ok() || head->empty()) {
    return absl::InternalError(Cat("session ", id, " closed, but its last record ", last,
                                   " cannot be read for the receipt"));
  }
  v1::Receipt receipt;
  receipt.set_session_id(id);
  receipt.set_last_sequence(last);
  receipt.set_head_hash(head->front().hash());
  auto row = ledger_->GetSession(id);
  receipt.set_chain_version(row.ok() ? row->chain_version : 1);
  receipt.set_signed_utc(audit::Rfc3339Nanos(utc_now_ns_()));
  if (absl::Status s = options_.receipt_key->Sign(&receipt); !s.ok()) return s;
  return ledger_->PutReceipt(receipt, options_.receipt_key->public_pem());
}

}  // namespace tickmark::rpc

#include "server/core/disciplined_clock.h"

#include <sys/timex.h>
#include <time.h>

namespace tickmark {
namespace {

int64_t SystemRealtimeNanos() {
  timespec ts{};
  clock_gettime(CLOCK_REALTIME, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 + ts.tv_nsec;
}

// A bound a kernel could report for a synchronised clock: above zero and
// below the 16 s clamp.
bool SaneBound(Duration bound) { return bound > Duration::Zero() && bound < kMaxDisciplineBound; }

// 500 ppm of `span` (kDisciplineRatePpm), rounded up; saturates.
Duration RateError(Duration span) {
  if (span <= Duration::Zero()) return Duration::Zero();
  // span / 2000 is 500 ppm exactly; round up so the bound never shrinks.
  const int64_t ns = span.nanos();
  constexpr int64_t kPerMillion = 1'000'000 / kDisciplineRatePpm;  // 2000
  return Duration::Nanos(ns / kPerMillion + (ns % kPerMillion != 0 ? 1 : 0));
}

}  // namespace

DisciplineState KernelDiscipline::Read() const {
  DisciplineState s;
  timex tx{};  // modes 0: read only (adjtimex(2))
  const int r = ntp_adjtime(&tx);
  s.clock_state = r;
  if (r == -1) return s;  // not synced; the bound stays zero
  s.status = tx.status;
  s.max_error = Duration::Micros(tx.maxerror);  // µs (adjtimex(2))
  s.est_error = Duration::Micros(tx.esterror);  // µs (adjtimex(2))
  // adjtimex(2), RETURN VALUE: TIME_ERROR means "not synchronized"; STA_UNSYNC
  // is the daemon's own flag; the 16 s clamp is where the kernel sets it.
  s.synced = r != TIME_ERROR && (tx.status & STA_UNSYNC) == 0 && SaneBound(s.max_error);
  return s;
}

int64_t KernelDiscipline::RealtimeNanos() const { return SystemRealtimeNanos(); }

const KernelDiscipline* KernelDiscipline::Get() {
  static const KernelDiscipline kInstance;
  return &kInstance;
}

DisciplineState FakeDiscipline::Read() const {
  std::lock_guard<std::mutex> lock(mu_);
  ++reads_;
  return state_;
}

int64_t FakeDiscipline::RealtimeNanos() const {
  const int64_t base = realtime_ != nullptr ? realtime_->NowNanos() : SystemRealtimeNanos();
  std::lock_guard<std::mutex> lock(mu_);
  return time_internal::SaturatingAdd(base, offset_.nanos());
}

void FakeDiscipline::Set(const DisciplineState& state) {
  std::lock_guard<std::mutex> lock(mu_);
  state_ = state;
}

void FakeDiscipline::SetSynced(Duration max_error) {
  DisciplineState s;
  s.synced = true;
  s.max_error = max_error;
  s.est_error = max_error / 10;
  s.status = STA_PLL;
  s.clock_state = TIME_OK;
  Set(s);
}

void FakeDiscipline::SetUnsynced() {
  DisciplineState s;
  s.synced = false;
  s.max_error = kMaxDisciplineBound;
  s.est_error = kMaxDisciplineBound;
  s.status = STA_UNSYNC;
  s.clock_state = TIME_ERROR;
  Set(s);
}

void FakeDiscipline::SetRealtimeOffset(Duration offset) {
  std::lock_guard<std::mutex> lock(mu_);
  offset_ = offset;
}

int64_t FakeDiscipline::reads() const {
  std::lock_guard<std::mutex> lock(mu_);
  return reads_;
}

DisciplineCache::DisciplineCache(const ClockDiscipline* source, const MonotonicSource* clock,
                                 Duration refresh)
    : source_(source), clock_(clock), refresh_(refresh) {}

DisciplineCache::Snapshot DisciplineCache::Get() {
  const int64_t now = clock_->NowNanos();
  std::lock_guard<std::mutex> lock(mu_);
  if (!state_ || now - read_at_ns_ >= refresh_.nanos() || now < read_at_ns_) {
    state_ = source_->Read();  // a syscall, not I/O that can block
    read_at_ns_ = now;
  }
  return {*state_, Duration::Nanos(now - read_at_ns_)};
}

const char* TimeSourceReasonName(TimeSourceReason reason) {
  switch (reason) {
    case TimeSourceReason::kRealtime:
      return "realtime";
    case TimeSourceReason::kDisabled:
      return "disabled";
    case TimeSourceReason::kNoReading:
      return "no_reading";
    case TimeSourceReason::kClientUnsynced:
      return "client_unsynced";
    case TimeSourceReason::kClientBound:
      return "client_bound_missing";
    case TimeSourceReason::kServerUnsynced:
      return "server_unsynced";
    case TimeSourceReason::kServerBound:
      return "server_bound_missing";
    case TimeSourceReason::kNotTighter:
      return "not_tighter";
    case TimeSourceReason::kDisagrees:
      return "disagrees";
    case TimeSourceReason::kOutOfRange:
      return "out_of_range";
    case TimeSourceReason::kImplausible:
      return "implausible";
  }
  return "unknown";
}

Duration RealtimeBound(Duration client_bound, Duration server_bound, Duration server_state_age,
                       Duration event_age, Duration read_spread) {
  return client_bound + server_bound + Abs(read_spread) +
         RateError(Abs(server_state_age) + Abs(event_age) * 2);
}

TimeSourceDecision ChooseTimeSource(const TimeSourceInputs& in) {
  TimeSourceDecision d;
  d.uncertainty = in.round_trip_uncertainty;
  auto round_trip = [&d](TimeSourceReason why) {
    d.source = TimeSourceChoice::kRoundTrip;
    d.reason = why;
    return d;
  };
  if (!in.enabled) return round_trip(TimeSourceReason::kDisabled);
  if (in.client.realtime_ns <= 0) return round_trip(TimeSourceReason::kNoReading);
  if (!in.client.synced) return round_trip(TimeSourceReason::kClientUnsynced);
  if (!SaneBound(in.client.bound)) return round_trip(TimeSourceReason::kClientBound);
  if (!in.server.synced) return round_trip(TimeSourceReason::kServerUnsynced);
  if (!SaneBound(in.server.max_error)) return round_trip(TimeSourceReason::kServerBound);
  if (!in.disagreement) return round_trip(TimeSourceReason::kOutOfRange);
  d.realtime_bound = RealtimeBound(in.client.bound, in.server.max_error, in.server_state_age,
                                   in.event_age, in.read_spread);
  if (d.realtime_bound >= in.round_trip_uncertainty) {
    return round_trip(TimeSourceReason::kNotTighter);
  }
  // Both intervals should hold the truth, so they must overlap.
  if (Abs(*in.disagreement) > d.realtime_bound + in.round_trip_uncertainty) {
    return round_trip(TimeSourceReason::kDisagrees);
  }
  d.source = TimeSourceChoice::kRealtime;
  d.reason = TimeSourceReason::kRealtime;
  d.uncertainty = d.realtime_bound;
  return d;
}

std::optional<RealtimeReading> ReadRealtimeAt(int64_t event_ns, const MonotonicSource& clock,
                                              const ClockDiscipline& discipline) {
  if (event_ns <= 0) return std::nullopt;
  const DisciplineState state = discipline.Read();
  if (!state.synced || !SaneBound(state.max_error)) return std::nullopt;
  const int64_t before = discipline.RealtimeNanos();
  const int64_t now = clock.NowNanos();
  const int64_t after = discipline.RealtimeNanos();
  int64_t spread = 0;
  if (!time_internal::CheckedSub(after, before, &spread) || spread < 0) return std::nullopt;
  const int64_t realtime_now = before + spread / 2;
  int64_t since = 0;
  int64_t at = 0;
  if (!time_internal::CheckedSub(now, event_ns, &since) ||
      !time_internal::CheckedSub(realtime_now, since, &at) || at <= 0) {
    return std::nullopt;
  }
  const Duration bound = state.max_error + Duration::Nanos(spread - spread / 2);
  if (!SaneBound(bound)) return std::nullopt;
  return RealtimeReading{at, bound, true};
}

std::optional<SessionTime> RealtimeToSession(int64_t realtime_ns, SessionTime anchor_session,
                                             int64_t anchor_realtime_ns) {
  int64_t since = 0;
  if (!time_internal::CheckedSub(realtime_ns, anchor_realtime_ns, &since)) return std::nullopt;
  return CheckedAdd(anchor_session, Duration::Nanos(since));
}

}  // namespace tickmark

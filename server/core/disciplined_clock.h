// Disciplined clocks (docs/time-model.md, "Disciplined clocks"): when a
// host's CLOCK_REALTIME is kept on UTC by an NTP or PTP daemon, its kernel
// says so, with an error bound. If both the server and a client say so, an
// event time can be mapped through real time instead of through the
// round-trip clock model, whose uncertainty can never fall below δ/2 (the
// path asymmetry no probe can see). This header holds
//
//   ClockDiscipline     the kernel's discipline state and CLOCK_REALTIME, as
//                       an interface: KernelDiscipline reads the kernel
//                       (ntp_adjtime, Linux adjtimex(2)); FakeDiscipline is
//                       set by hand in tests.
//   DisciplineCache     the server's own state, read at most once per
//                       refresh interval and shared by every stream.
//   ChooseTimeSource    the pure decision: real time or the round trip, with
//                       the bound that goes with it and the reason.
//
// The kernel's words (Linux adjtimex(2) and ntp_gettime(3) manual pages):
// `maxerror` and `esterror` are in microseconds; maxerror is the daemon's
// bound on |CLOCK_REALTIME − UTC|, which the kernel itself grows each second
// and clamps at 16 s, where it sets STA_UNSYNC; the call returns TIME_ERROR
// when the clock is not synchronised (STA_UNSYNC or STA_CLOCKERR set, or
// the PPS conditions listed there).
//
// Thread safety: KernelDiscipline and FakeDiscipline may be read from any
// thread; FakeDiscipline's setters too. DisciplineCache is thread-safe.
// ChooseTimeSource, RealtimeBound and RealtimeToSession are pure;
// ReadRealtimeAt reads the clocks it is given.
#ifndef TICKMARK_SERVER_CORE_DISCIPLINED_CLOCK_H_
#define TICKMARK_SERVER_CORE_DISCIPLINED_CLOCK_H_

#include <cstdint>
#include <mutex>
#include <optional>

#include "server/core/time.h"

namespace tickmark {

// Linux clamps maxerror at 16 s and then reports the clock unsynchronised
// (ntp_gettime(3): maxerror "is clamped to an upper limit", the kernel's
// NTP_PHASE limit; an unsynchronised kernel reports 16000000 µs). A bound
// at or above it is no bound.
constexpr Duration kMaxDisciplineBound = Duration::Seconds(16);
// The worst rate error assumed for either clock over short spans: 500 ppm,
// the largest frequency correction Linux accepts (adjtimex(2): ADJ_FREQUENCY
// is clamped to ±32768000 in units of 2^-16 ppm, i.e. ±500 ppm) and the rate
// at which the kernel itself grows maxerror between daemon updates (500 µs
// each second; from memory, the kernel's MAXFREQ).
constexpr int64_t kDisciplineRatePpm = 500;

// What a host's kernel says about its CLOCK_REALTIME.
struct DisciplineState {
  bool synced = false;   // see KernelDiscipline::Read for the rule
  Duration max_error;    // maxerror: the bound on |CLOCK_REALTIME − UTC|
  Duration est_error;    // esterror: the daemon's estimate (not a bound)
  int status = 0;        // the raw STA_* bits
  int clock_state = -1;  // the call's result (TIME_OK .. TIME_ERROR); -1: the call failed
};

// The kernel's clock discipline, injectable.
class ClockDiscipline {
 public:
  virtual ~ClockDiscipline() = default;
  // The discipline state now.
  virtual DisciplineState Read() const = 0;
  // CLOCK_REALTIME now, in nanoseconds since the Unix epoch.
  virtual int64_t RealtimeNanos() const = 0;
};

// The running kernel's: ntp_adjtime with no mode bits (a read; needs no
// privilege). Thread-safe.
class KernelDiscipline final : public ClockDiscipline {
 public:
  // synced when the call returned neither -1 nor TIME_ERROR, STA_UNSYNC is
  // clear (adjtimex(2)) and maxerror is below the kernel's 16 s clamp.
  DisciplineState Read() const override;
  int64_t RealtimeNanos() const override;
  // A process-wide instance.
  static const KernelDiscipline* Get();
};

// A discipline set by hand. Starts unsynchronised; its real time is the
// given source's reading (null: the system CLOCK_REALTIME) plus an offset,
// so a test can put a "synchronised" clock off by more than its bound.
// Thread-safe.
class FakeDiscipline final : public ClockDiscipline {
 public:
  explicit FakeDiscipline(const MonotonicSource* realtime = nullptr) : realtime_(realtime) {}
  DisciplineState Read() const override;
  int64_t RealtimeNanos() const override;

  void Set(const DisciplineState& state);
  // Synchronised with this maxerror (esterror a tenth of it).
  void SetSynced(Duration max_error);
  // Unsynchronised, as a kernel with no daemon reports it (STA_UNSYNC,
  // TIME_ERROR, maxerror at the 16 s clamp).
  void SetUnsynced();
  void SetRealtimeOffset(Duration offset);
  // How many times Read was called (tests check the cache with it).
  int64_t reads() const;

 private:
  const MonotonicSource* const realtime_;  // not owned; null: CLOCK_REALTIME
  mutable std::mutex mu_;
  DisciplineState state_;      // GUARDED_BY(mu_)
  Duration offset_;            // GUARDED_BY(mu_)
  mutable int64_t reads_ = 0;  // GUARDED_BY(mu_)
};

// The server's own discipline state, read at most once per `refresh` (a
// syscall per message would be waste; the state changes at the daemon's
// pace). Thread-safe.
class DisciplineCache {
 public:
  struct Snapshot {
    DisciplineState state;
    Duration age;  // how long ago it was read (on `clock`)
  };
  // Neither pointer is owned; both outlive the cache.
  DisciplineCache(const ClockDiscipline* source, const MonotonicSource* clock, Duration refresh);
  Snapshot Get();
  const ClockDiscipline* source() const { return source_; }

 private:
  const ClockDiscipline* const source_;
  const MonotonicSource* const clock_;
  const Duration refresh_;
  std::mutex mu_;
  std::optional<DisciplineState> state_;  // GUARDED_BY(mu_)
  int64_t read_at_ns_ = 0;                // GUARDED_BY(mu_)
};

// What a client sent about its real-time clock with an event.
struct RealtimeReading {
  int64_t realtime_ns = 0;  // its CLOCK_REALTIME at the event; 0: none
  Duration bound;           // its kernel's maxerror; zero: none
  bool synced = false;      // its kernel said synchronised
};

enum class TimeSourceChoice { kRoundTrip, kRealtime };

// Why ChooseTimeSource chose as it did. TimeSourceReasonName gives the
// word stored in the record (Feedback/Step.time_source_reason).
enum class TimeSourceReason {
  kRealtime,        // "realtime": every condition held
  kDisabled,        // "disabled": the server's real-time mapping is off
  kNoReading,       // "no_reading": the client sent no real-time reading
  kClientUnsynced,  // "client_unsynced": the client's kernel said unsynchronised
  kClientBound,     // "client_bound_missing": its bound is zero, negative or ≥ 16 s
  kServerUnsynced,  // "server_unsynced": the server's kernel said unsynchronised
  kServerBound,     // "server_bound_missing": the server's bound is zero or ≥ 16 s
  kNotTighter,      // "not_tighter": the real-time bound does not beat the round trip
  kDisagrees,       // "disagrees": the two routes lie further apart than both bounds allow
  kOutOfRange,      // "out_of_range": the reading cannot be mapped (int64 overflow)
  // "implausible": set by the caller, not by ChooseTimeSource: the real-time
  // mapping failed the server's plausibility checks (an event after its
  // arrival beyond its bound, say), so one of the bounds was false.
  kImplausible,
};
const char* TimeSourceReasonName(TimeSourceReason reason);

struct TimeSourceInputs {
  bool enabled = true;        // the server's --no-realtime-mapping not given
  DisciplineState server;     // the server's kernel state ...
  Duration server_state_age;  // ... read this long ago
  RealtimeReading client;     // what the client sent
  // How far the event lies from the instant the server read its own
  // real-time/session pair (≥ 0; both clocks may drift over it).
  Duration event_age;
  // Half the width of the server's bracket around that pair reading.
  Duration read_spread;
  // The round-trip model's uncertainty at the event.
  Duration round_trip_uncertainty;
  // |real-time-mapped − round-trip-mapped|, when both were computed;
  // nullopt when the reading could not be mapped.
  std::optional<Duration> disagreement;
};

struct TimeSourceDecision {
  TimeSourceChoice source = TimeSourceChoice::kRoundTrip;
  TimeSourceReason reason = TimeSourceReason::kNoReading;
  Duration realtime_bound;  // the real-time route's whole bound; zero when not computed
  Duration uncertainty;     // the chosen route's: what the record states
};

// The real-time route's bound (docs/time-model.md, "Disciplined clocks"):
//   client bound + server bound + read spread
//     + 500 ppm × (server state age + 2 × event age)
// The mapped time's error is the client clock's error at the event minus
// the server clock's; each is within its kernel's maxerror when read, and
// either clock may run off by at most 500 ppm (the kernel's own maxerror
// growth rate) between that read and the event: the client read its bound
// when it sent (at most one event age after the event), the server its own
// `server_state_age` before its pair reading, one event age from the event.
Duration RealtimeBound(Duration client_bound, Duration server_bound, Duration server_state_age,
                       Duration event_age, Duration read_spread);

// Real time only when the mapping is enabled, the client sent a reading
// with a sane bound and said synchronised, the server's kernel says
// synchronised with a sane bound, the whole real-time bound is strictly
// below the round-trip uncertainty, and the two routes agree within the sum
// of their bounds (if they do not, one bound is false, and the round trip's
// δ/2 rests on physics, not on a daemon's claim). Otherwise the round trip.
TimeSourceDecision ChooseTimeSource(const TimeSourceInputs& in);

// The client side: what to send with an event stamped `event_ns` on
// `clock` — CLOCK_REALTIME at that instant and the kernel's bound — or
// nullopt when the kernel does not say synchronised (then nothing is sent),
// the event time is not positive, or the result does not fit. The real time
// at the event is realtime_now − (clock_now − event_ns): the client's clock
// and its CLOCK_REALTIME advance together (CLOCK_MONOTONIC is slewed with
// CLOCK_REALTIME; clock_gettime(2)). clock_now is read between two real-time
// readings; half their spread is added to the bound.
std::optional<RealtimeReading> ReadRealtimeAt(int64_t event_ns, const MonotonicSource& clock,
                                              const ClockDiscipline& discipline);

// The session time of a real-time reading, given a pair read together on
// the server: `anchor_session` (session time) and `anchor_realtime_ns` (its
// CLOCK_REALTIME). nullopt if it does not fit in int64.
std::optional<SessionTime> RealtimeToSession(int64_t realtime_ns, SessionTime anchor_session,
                                             int64_t anchor_realtime_ns);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_DISCIPLINED_CLOCK_H_

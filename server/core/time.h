// Time types for tickmark.
//
// Every time in tickmark is an integer count of nanoseconds, wrapped in a
// type that says what it measures, so a duration cannot be passed where an
// instant is expected and an instant on one clock cannot be mixed with an
// instant on another:
//   Duration     a signed length of time.
//   SessionTime  an instant on the session timeline (docs/architecture.md §4): the
//                server's monotonic clock anchored to UTC when the session
//                opened, as nanoseconds since the Unix epoch.
//   ClientTime   an instant on one client's raw clock (a source or agent);
//                meaningful only together with that client's clock model.
//
// Clocks are injected (Clock below) so tests drive time by hand.
// All types are values; thread-compatible.
#ifndef TICKMARK_SERVER_CORE_TIME_H_
#define TICKMARK_SERVER_CORE_TIME_H_

#include <atomic>
#include <cmath>
#include <cstdint>
#include <limits>
#include <optional>

namespace tickmark {

// Overflow-safe int64 arithmetic for times. Times arrive from outside (probe
// replies, event stamps, hello readings), so any sum or difference of two of
// them may leave int64; signed overflow is undefined behaviour in C++.
//   Checked*   return false on overflow and leave *out unspecified: for code
//              that must reject what it cannot represent (ClockModel).
//   Saturating* clamp to [INT64_MIN, INT64_MAX]: what the operators below
//              use, so an absurd input gives an absurd but defined value that
//              later plausibility checks can refuse, never a wrapped one.
namespace time_internal {

constexpr int64_t kMaxNs = std::numeric_limits<int64_t>::max();
constexpr int64_t kMinNs = std::numeric_limits<int64_t>::min();

constexpr bool CheckedAdd(int64_t a, int64_t b, int64_t* out) {
  return !__builtin_add_overflow(a, b, out);
}
constexpr bool CheckedSub(int64_t a, int64_t b, int64_t* out) {
  return !__builtin_sub_overflow(a, b, out);
}
constexpr bool CheckedMul(int64_t a, int64_t b, int64_t* out) {
  return !__builtin_mul_overflow(a, b, out);
}
constexpr int64_t SaturatingAdd(int64_t a, int64_t b) {
  int64_t r = 0;
  if (CheckedAdd(a, b, &r)) return r;
  return b > 0 ? kMaxNs : kMinNs;
}
constexpr int64_t SaturatingSub(int64_t a, int64_t b) {
  int64_t r = 0;
  if (CheckedSub(a, b, &r)) return r;
  return b < 0 ? kMaxNs : kMinNs;
}
constexpr int64_t SaturatingMul(int64_t a, int64_t b) {
  int64_t r = 0;
  if (CheckedMul(a, b, &r)) return r;
  return (a < 0) != (b < 0) ? kMinNs : kMaxNs;
}
constexpr int64_t SaturatingNeg(int64_t a) { return a == kMinNs ? kMaxNs : -a; }
constexpr int64_t SaturatingDiv(int64_t a, int64_t d) {
  return (a == kMinNs && d == -1) ? kMaxNs : a / d;
}

}  // namespace time_internal

// Arithmetic saturates (see time_internal): an overflowing sum is
// Duration::Max() or Duration::Min(), never a wrapped value.
class Duration {
 public:
  constexpr Duration() = default;
  static constexpr Duration Nanos(int64_t ns) { return Duration(ns); }
  static constexpr Duration Micros(int64_t us) {
    return Duration(time_internal::SaturatingMul(us, 1000));
  }
  static constexpr Duration Millis(int64_t ms) {
    return Duration(time_internal::SaturatingMul(ms, 1000000));
  }
  static constexpr Duration Seconds(int64_t s) {
    return Duration(time_internal::SaturatingMul(s, 1000000000));
  }
  // Rounds to the nearest nanosecond; saturates beyond ±Max; NaN gives Zero.
  static Duration FromSeconds(double s) {
    const double ns = s * 1e9;
    if (std::isnan(ns)) return Zero();
    // 2^63 exactly; every double below it converts without overflow.
    constexpr double kLimit = 9223372036854775808.0;
    if (ns >= kLimit) return Max();
    if (ns <= -kLimit) return Min();
    return Duration(static_cast<int64_t>(std::llround(ns)));
  }
  static constexpr Duration Zero() { return Duration(0); }
  static constexpr Duration Max() { return Duration(time_internal::kMaxNs); }
  static constexpr Duration Min() { return Duration(time_internal::kMinNs); }

  constexpr int64_t nanos() const { return ns_; }
  constexpr double seconds() const { return static_cast<double>(ns_) * 1e-9; }
  constexpr double millis() const { return static_cast<double>(ns_) * 1e-6; }

  constexpr Duration operator+(Duration o) const {
    return Duration(time_internal::SaturatingAdd(ns_, o.ns_));
  }
  constexpr Duration operator-(Duration o) const {
    return Duration(time_internal::SaturatingSub(ns_, o.ns_));
  }
  constexpr Duration operator-() const { return Duration(time_internal::SaturatingNeg(ns_)); }
  constexpr Duration operator/(int64_t d) const {
    return Duration(time_internal::SaturatingDiv(ns_, d));
  }
  constexpr Duration operator*(int64_t k) const {
    return Duration(time_internal::SaturatingMul(ns_, k));
  }
  Duration& operator+=(Duration o) { return *this = *this + o; }
  Duration& operator-=(Duration o) { return *this = *this - o; }
  constexpr auto operator<=>(const Duration&) const = default;

 private:
  constexpr explicit Duration(int64_t ns) : ns_(ns) {}
  int64_t ns_ = 0;
};

constexpr Duration Abs(Duration d) { return d < Duration::Zero() ? -d : d; }

// a + b, or nullopt if it does not fit.
constexpr std::optional<Duration> CheckedAdd(Duration a, Duration b) {
  int64_t r = 0;
  if (!time_internal::CheckedAdd(a.nanos(), b.nanos(), &r)) return std::nullopt;
  return Duration::Nanos(r);
}
// a − b, or nullopt if it does not fit.
constexpr std::optional<Duration> CheckedSub(Duration a, Duration b) {
  int64_t r = 0;
  if (!time_internal::CheckedSub(a.nanos(), b.nanos(), &r)) return std::nullopt;
  return Duration::Nanos(r);
}

// An instant on a named clock. Tag keeps clocks apart at compile time.
// Arithmetic saturates like Duration's; CheckedSub/CheckedAdd below say when
// it would not fit.
template <typename Tag>
class Instant {
 public:
  constexpr Instant() = default;
  static constexpr Instant FromNanos(int64_t ns) { return Instant(ns); }
  constexpr int64_t nanos() const { return ns_; }
  constexpr double seconds() const { return static_cast<double>(ns_) * 1e-9; }

  constexpr Instant operator+(Duration d) const {
    return Instant(time_internal::SaturatingAdd(ns_, d.nanos()));
  }
  constexpr Instant operator-(Duration d) const {
    return Instant(time_internal::SaturatingSub(ns_, d.nanos()));
  }
  constexpr Duration operator-(Instant o) const {
    return Duration::Nanos(time_internal::SaturatingSub(ns_, o.ns_));
  }
  Instant& operator+=(Duration d) { return *this = *this + d; }
  constexpr auto operator<=>(const Instant&) const = default;

 private:
  constexpr explicit Instant(int64_t ns) : ns_(ns) {}
  int64_t ns_ = 0;
};

// a − b for two instants on the same clock, or nullopt if it does not fit.
template <typename Tag>
constexpr std::optional<Duration> CheckedSub(Instant<Tag> a, Instant<Tag> b) {
  int64_t r = 0;
  if (!time_internal::CheckedSub(a.nanos(), b.nanos(), &r)) return std::nullopt;
  return Duration::Nanos(r);
}
// t + d, or nullopt if it does not fit.
template <typename Tag>
constexpr std::optional<Instant<Tag>> CheckedAdd(Instant<Tag> t, Duration d) {
  int64_t r = 0;
  if (!time_internal::CheckedAdd(t.nanos(), d.nanos(), &r)) return std::nullopt;
  return Instant<Tag>::FromNanos(r);
}

struct SessionClockTag {};
struct ClientClockTag {};
using SessionTime = Instant<SessionClockTag>;
using ClientTime = Instant<ClientClockTag>;

// A source of monotonic nanoseconds. Implementations say whether they are
// thread-safe; the ones here are.
class MonotonicSource {
 public:
  virtual ~MonotonicSource() = default;
  // Nanoseconds on a clock that never steps backwards.
  virtual int64_t NowNanos() const = 0;
};

// A clock tests move by hand. Thread-safe.
class FakeMonotonic final : public MonotonicSource {
 public:
  explicit FakeMonotonic(int64_t start_ns = 1'000'000'000) : now_(start_ns) {}
  int64_t NowNanos() const override { return now_.load(); }
  void Advance(Duration d) { now_.fetch_add(d.nanos()); }
  void Set(int64_t ns) { now_.store(ns); }

 private:
  std::atomic<int64_t> now_;
};

// The process's CLOCK_MONOTONIC (declared here, defined in time.cc so that
// core's headers stay free of system headers). Thread-safe.
class SystemMonotonic final : public MonotonicSource {
 public:
  int64_t NowNanos() const override;
  // A process-wide instance, for callers that hold a pointer to their clock.
  static const SystemMonotonic* Get();
};

// Session time (docs/architecture.md §4): anchored to UTC once, then advanced only by a
// monotonic clock, so a step of the wall clock never moves it.
// Thread-safe after construction.
class SessionClock {
 public:
  // utc_at_open_ns: the wall clock at anchoring; mono: the monotonic source.
  SessionClock(int64_t utc_at_open_ns, const MonotonicSource* mono)
      : utc_at_open_ns_(utc_at_open_ns),
        mono_at_open_ns_(mono->NowNanos()),
        mono_(mono) {}
  // Continues a timeline anchored earlier: utc_anchor_ns was the session
  // time when `mono` read mono_anchor_ns.
  SessionClock(int64_t utc_anchor_ns, int64_t mono_anchor_ns, const MonotonicSource* mono)
      : utc_at_open_ns_(utc_anchor_ns), mono_at_open_ns_(mono_anchor_ns), mono_(mono) {}

  SessionTime Now() const {
    const Duration since = Duration::Nanos(
        time_internal::SaturatingSub(mono_->NowNanos(), mono_at_open_ns_));
    return SessionTime::FromNanos(utc_at_open_ns_) + since;
  }
  int64_t utc_anchor_ns() const { return utc_at_open_ns_; }
  int64_t mono_anchor_ns() const { return mono_at_open_ns_; }

 private:
  int64_t utc_at_open_ns_;   // wall clock when anchored
  int64_t mono_at_open_ns_;  // monotonic reading when anchored
  const MonotonicSource* mono_;  // not owned; outlives this
};

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_TIME_H_

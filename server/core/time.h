// Time types for tickmark.
//
// Every time in tickmark is an integer count of nanoseconds, wrapped in a
// type that says what it measures, so a duration cannot be passed where an
// instant is expected and an instant on one clock cannot be mixed with an
// instant on another:
//   Duration     a signed length of time.
//   SessionTime  an instant on the session timeline (design.md §4): the
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

namespace tickmark {

class Duration {
 public:
  constexpr Duration() = default;
  static constexpr Duration Nanos(int64_t ns) { return Duration(ns); }
  static constexpr Duration Micros(int64_t us) { return Duration(us * 1000); }
  static constexpr Duration Millis(int64_t ms) { return Duration(ms * 1000000); }
  static constexpr Duration Seconds(int64_t s) { return Duration(s * 1000000000); }
  // Rounds to the nearest nanosecond.
  static Duration FromSeconds(double s) {
    return Duration(static_cast<int64_t>(std::llround(s * 1e9)));
  }
  static constexpr Duration Zero() { return Duration(0); }
  static constexpr Duration Max() {
    return Duration(std::numeric_limits<int64_t>::max());
  }

  constexpr int64_t nanos() const { return ns_; }
  constexpr double seconds() const { return static_cast<double>(ns_) * 1e-9; }
  constexpr double millis() const { return static_cast<double>(ns_) * 1e-6; }

  constexpr Duration operator+(Duration o) const { return Duration(ns_ + o.ns_); }
  constexpr Duration operator-(Duration o) const { return Duration(ns_ - o.ns_); }
  constexpr Duration operator-() const { return Duration(-ns_); }
  constexpr Duration operator/(int64_t d) const { return Duration(ns_ / d); }
  constexpr Duration operator*(int64_t k) const { return Duration(ns_ * k); }
  Duration& operator+=(Duration o) { ns_ += o.ns_; return *this; }
  Duration& operator-=(Duration o) { ns_ -= o.ns_; return *this; }
  constexpr auto operator<=>(const Duration&) const = default;

 private:
  constexpr explicit Duration(int64_t ns) : ns_(ns) {}
  int64_t ns_ = 0;
};

constexpr Duration Abs(Duration d) { return d < Duration::Zero() ? -d : d; }

// An instant on a named clock. Tag keeps clocks apart at compile time.
template <typename Tag>
class Instant {
 public:
  constexpr Instant() = default;
  static constexpr Instant FromNanos(int64_t ns) { return Instant(ns); }
  constexpr int64_t nanos() const { return ns_; }
  constexpr double seconds() const { return static_cast<double>(ns_) * 1e-9; }

  constexpr Instant operator+(Duration d) const { return Instant(ns_ + d.nanos()); }
  constexpr Instant operator-(Duration d) const { return Instant(ns_ - d.nanos()); }
  constexpr Duration operator-(Instant o) const { return Duration::Nanos(ns_ - o.ns_); }
  Instant& operator+=(Duration d) { ns_ += d.nanos(); return *this; }
  constexpr auto operator<=>(const Instant&) const = default;

 private:
  constexpr explicit Instant(int64_t ns) : ns_(ns) {}
  int64_t ns_ = 0;
};

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
};

// Session time (design.md §4): anchored to UTC once, then advanced only by a
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
    return SessionTime::FromNanos(utc_at_open_ns_ +
                                  (mono_->NowNanos() - mono_at_open_ns_));
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

// A client clock for tests: a MonotonicSource seen through a constant offset
// and a rate error (drift), with steps on demand. Stands in for a source's or
// an agent's own clock, so clock estimation can be checked against the truth.
//
// With m0 the monotonic reading at construction and m the reading now:
//   Now() = m0 + offset + (m − m0) + round((m − m0) · drift_ppm / 1e6)
// so at construction the clock reads m0 + offset and then runs
// (1 + drift_ppm·1e-6) times as fast as the monotonic source. Jump(d) adds d
// to the offset (a stepped clock). With integer drift_ppm and elapsed times
// below 2^53 ns / drift_ppm the arithmetic is exact.
//
// Header-only; depends on server/core/time.h alone. Thread-safe: Now() and
// Jump() may race; the MonotonicSource (not owned) must outlive the clock.
#ifndef TICKMARK_TOOLS_LINKEMU_SIMULATED_CLOCK_H_
#define TICKMARK_TOOLS_LINKEMU_SIMULATED_CLOCK_H_

#include <atomic>
#include <cmath>
#include <cstdint>

#include "server/core/time.h"

namespace tickmark::linkemu {

class SimulatedClock {
 public:
  SimulatedClock(const MonotonicSource* mono, Duration offset, double drift_ppm)
      : mono_(mono),
        mono_at_start_ns_(mono->NowNanos()),
        offset_ns_(offset.nanos()),
        drift_ppm_(drift_ppm) {}

  // The client's reading now.
  ClientTime Now() const { return At(mono_->NowNanos()); }

  // The client's reading at monotonic instant `mono_ns` (any instant, past
  // or future), with the current offset.
  ClientTime At(int64_t mono_ns) const {
    const int64_t elapsed = mono_ns - mono_at_start_ns_;
    const int64_t drift = std::llround(static_cast<double>(elapsed) * drift_ppm_ / 1e6);
    return ClientTime::FromNanos(mono_at_start_ns_ + offset_ns_.load() + elapsed +
                                 drift);
  }

  // Steps the clock by `d` (positive: forward), as an operator or a time
  // daemon setting the wall clock would.
  void Jump(Duration d) { offset_ns_.fetch_add(d.nanos()); }

  // The constant offset, every Jump included; the drift comes on top.
  Duration offset() const { return Duration::Nanos(offset_ns_.load()); }
  double drift_ppm() const { return drift_ppm_; }

 private:
  const MonotonicSource* mono_;      // not owned
  const int64_t mono_at_start_ns_;   // m0
  std::atomic<int64_t> offset_ns_;   // constant offset plus every Jump
  const double drift_ppm_;           // rate error, parts per million
};

}  // namespace tickmark::linkemu

#endif  // TICKMARK_TOOLS_LINKEMU_SIMULATED_CLOCK_H_

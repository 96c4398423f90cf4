// The clock model's stated uncertainty, term by term (docs/time-model.md,
// "Uncertainty"):
//   UncertaintyAt(t) = asymmetry + offset scatter + |t − reference|·(PHI + drift error)
// and the promise behind it: the true session time of an event lies inside.
// A device clock with a known offset and drift sits behind a link whose
// one-way delays are drawn from seeded distributions; session time comes from
// a FakeMonotonic; nothing sleeps or reads a real clock.
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <functional>
#include <random>
#include <vector>

#include "gtest/gtest.h"
#include "server/core/clock_model.h"
#include "server/core/time.h"

namespace tickmark::clock_uncertainty_test {
namespace {

constexpr int64_t kOpenUtcNs = 1'700'000'000'000'000'000;  // the session's anchor
constexpr double kPhi = ClockModel::kPhiPpm * 1e-6;        // RFC 5905 §9.2

// A device clock: reads session time + offset, running drift_ppm fast.
class Device {
 public:
  Device(SessionTime origin, Duration offset, double drift_ppm)
      : origin_(origin), offset_(offset), drift_(drift_ppm * 1e-6) {}
  ClientTime Read(SessionTime s) const {
    const double since = static_cast<double>((s - origin_).nanos());
    return ClientTime::FromNanos(s.nanos()) + offset_ +
           Duration::Nanos(std::llround(since * drift_));
  }

 private:
  SessionTime origin_;
  Duration offset_;
  double drift_;
};

// One-way delays in [lo, hi], uniform.
struct Uniform {
  Duration lo, hi;
};

class Simulation {
 public:
  Simulation(Uniform forward, Uniform backward, double drift_ppm, uint64_t seed)
      : session_(kOpenUtcNs, &mono_),
        device_(session_.Now(), Duration::Millis(3200), drift_ppm),
        forward_(forward),
        backward_(backward),
        rng_(seed) {}

  // One probe started now; the session clock advances through it.
  ProbeTimestamps Probe() {
    ProbeTimestamps p;
    p.t1 = session_.Now();
    mono_.Advance(Draw(forward_));
    p.t2 = device_.Read(session_.Now());
    mono_.Advance(Duration::Micros(50));  // the device's hold
    p.t3 = device_.Read(session_.Now());
    mono_.Advance(Draw(backward_));
    p.t4 = session_.Now();
    return p;
  }
  // Moves the session clock to `since_open` after the first probe slot.
  void WaitUntil(Duration since_open) { mono_.Set(1'000'000'000 + since_open.nanos()); }
  SessionTime Now() const { return session_.Now(); }
  const Device& device() const { return device_; }

 private:
  Duration Draw(Uniform u) {
    std::uniform_int_distribution<int64_t> d(u.lo.nanos(), u.hi.nanos());
    return Duration::Nanos(d(rng_));
  }

  FakeMonotonic mono_;
  SessionClock session_;
  Device device_;
  Uniform forward_, backward_;
  std::mt19937_64 rng_;
};

constexpr Uniform kJittery{Duration::Millis(15), Duration::Millis(25)};  // 20 ms ± 5 ms
constexpr Uniform kLan{Duration::Micros(50), Duration::Micros(550)};     // 0.3 ms ± 0.25 ms

// |mapped − true| of an event at session time s, and the stated bound there.
struct Check {
  Duration error;
  Duration uncertainty;
};
Check At(const ClockModel& model, const Device& device, SessionTime s) {
  const ClientTime c = device.Read(s);
  return {Abs(model.ToSession(c) - s), model.UncertaintyAt(c)};
}

TEST(ClockUncertaintyTest, OneProbeStatesHalfItsRoundTripPlusThePriorGrowth) {
  // Forward 4 ms, backward 26 ms: the probe's offset is off by
  // (4 − 26)/2 = −11 ms, inside δ/2 = 15 ms (RFC 5905 §8).
  Simulation sim({Duration::Millis(4), Duration::Millis(4)},
                 {Duration::Millis(26), Duration::Millis(26)}, 0, 1);
  ClockModel model;
  ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
  const ClockEstimate e = model.estimate();
  EXPECT_EQ(e.asymmetry, Duration::Millis(15));  // δ/2, RFC 5905 §8
  EXPECT_EQ(e.offset_scatter, Duration::Zero());
  EXPECT_FALSE(e.drift_fitted);
  EXPECT_EQ(e.drift_ppm, 0.0);
  EXPECT_EQ(e.drift_error_ppm, 100.0);  // the prior's default: common practice, no source
  EXPECT_EQ(e.uncertainty, Duration::Millis(15));
  // 10 s away: + 10 s × (PHI 15 ppm, RFC 5905 §9.2 + the 100 ppm prior).
  EXPECT_EQ(model.UncertaintyAt(e.reference + Duration::Seconds(10)),
            Duration::Millis(15) + Duration::Micros(1150));
  EXPECT_EQ(model.UncertaintyAt(e.reference - Duration::Seconds(10)),
            Duration::Millis(15) + Duration::Micros(1150));
  const Check c = At(model, sim.device(), sim.Now());
  EXPECT_NEAR(c.error.millis(), 11.0, 0.01);  // simulated truth
  EXPECT_LE(c.error, c.uncertainty);
}

TEST(ClockUncertaintyTest, ThePriorIsAnOption) {
  ClockModel::Options o;
  o.drift_prior_ppm = 250;
  Simulation sim({Duration::Millis(5), Duration::Millis(5)},
                 {Duration::Millis(5), Duration::Millis(5)}, 0, 2);
  ClockModel model(o);
  ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
  const ClockEstimate e = model.estimate();
  EXPECT_EQ(e.drift_error_ppm, 250.0);
  // 4 s × (15 + 250) ppm = 1.06 ms on top of δ/2 = 5 ms.
  EXPECT_EQ(model.UncertaintyAt(e.reference + Duration::Seconds(4)),
            Duration::Millis(5) + Duration::Micros(1060));
}

// The three terms add up as documented, and the truth lies inside, once the
// offset comes from the envelopes (20 probes/s for 12 s).
TEST(ClockUncertaintyTest, TermsAddUpOnceTheOffsetComesFromTheEnvelopes) {
  Simulation sim(kJittery, kJittery, 80, 3);
  ClockModel model;
  for (int k = 0; k < 240; ++k) {
    sim.WaitUntil(Duration::Millis(50) * k);
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
  }
  const ClockEstimate e = model.estimate();
  // Read from the envelopes: the asymmetry term is the envelopes' δ/2, at
  // most the chosen probe's, and the dip they may have is stated.
  EXPECT_LE(e.asymmetry, e.min_delay / 2);
  EXPECT_GT(e.offset_scatter, Duration::Zero());
  EXPECT_EQ(e.uncertainty, e.asymmetry + e.offset_scatter);
  const Duration away = Duration::Seconds(5);
  const double growth_ns = static_cast<double>(away.nanos()) * (kPhi + e.drift_error_ppm * 1e-6);
  EXPECT_NEAR(static_cast<double>(model.UncertaintyAt(e.reference + away).nanos()),
              static_cast<double>(e.uncertainty.nanos()) + growth_ns, 2.0);
  for (int ms = 0; ms <= 5000; ms += 100) {
    const Check c = At(model, sim.device(), sim.Now() + Duration::Millis(ms));
    EXPECT_LE(c.error, c.uncertainty) << ms << " ms after the last probe";  // simulated truth
  }
}

// Points over a floor line with slope 2e-5 (20 ppm, x and y in ns), gaps
// drawn by `gap`: how often the fitted slope misses by more than the bound.
struct BoundMisses {
  int steep = 0, shallow = 0, trials = 0;
  double largest_error = 0;
};
BoundMisses CountMisses(int trials, int n, double span_ns, double miss,
                        const std::function<double(std::mt19937_64&)>& gap) {
  constexpr double kSlope = 2e-5;
  BoundMisses out;
  std::mt19937_64 rng(77);
  std::uniform_real_distribution<double> jitter(0.0, 1.0);
  for (int t = 0; t < trials; ++t) {
    std::vector<double> x(static_cast<size_t>(n)), y(static_cast<size_t>(n));
    for (int i = 0; i < n; ++i) {
      x[static_cast<size_t>(i)] = span_ns * (i + jitter(rng) * 0.5) / n;
      y[static_cast<size_t>(i)] = kSlope * x[static_cast<size_t>(i)] + gap(rng);
    }
    const Line fit = LowerEnvelopeFit(x, y);
    const SlopeErrorBound b = EnvelopeSlopeErrorBound(x, y, fit, miss);
    const double error = fit.slope - kSlope;
    out.largest_error = std::max(out.largest_error, std::abs(error));
    out.steep += error > b.steep ? 1 : 0;
    out.shallow += -error > b.shallow ? 1 : 0;
    ++out.trials;
  }
  // For the reader of the log, not asserted.
  std::printf("bound exceeded: steep %d, shallow %d of %d fits (miss %.3f per side)\n", out.steep,
              out.shallow, out.trials, miss);
  return out;
}

// EnvelopeSlopeErrorBound's promise, checked against simulated truth: each
// side is exceeded in at most `miss` of the fits (here 2 %; with 2000 fits,
// 40 expected at worst — the bound is conservative, so far fewer).
TEST(EnvelopeSlopeErrorBoundTest, HoldsAtItsStatedRateForUniformGaps) {
  const BoundMisses m = CountMisses(2000, 100, 100e9, 0.02, [](std::mt19937_64& rng) {
    return std::uniform_real_distribution<double>(0, 10e6)(rng);  // 10 ms of jitter
  });
  EXPECT_LE(m.steep, 40);
  EXPECT_LE(m.shallow, 40);
  EXPECT_GT(m.largest_error, 1e-6);  // the fits do err: the check is not empty
}

TEST(EnvelopeSlopeErrorBoundTest, HoldsForGapsWithoutASharpFloor) {
  // The sum of two uniform delays: the density rises from zero at the floor,
  // so the lowest points sit further above it than with uniform gaps.
  const BoundMisses m = CountMisses(2000, 100, 100e9, 0.02, [](std::mt19937_64& rng) {
    std::uniform_real_distribution<double> u(0, 5e6);
    return u(rng) + u(rng);
  });
  EXPECT_LE(m.steep, 40);
  EXPECT_LE(m.shallow, 40);
}

TEST(EnvelopeSlopeErrorBoundTest, HoldsForExponentialGaps) {
  const BoundMisses m = CountMisses(2000, 60, 60e9, 0.02, [](std::mt19937_64& rng) {
    return std::exponential_distribution<double>(1 / 2e6)(rng);  // mean 2 ms
  });
  EXPECT_LE(m.steep, 40);
  EXPECT_LE(m.shallow, 40);
}

TEST(EnvelopeSlopeErrorBoundTest, InfiniteWhereThePointsCannotBoundIt) {
  const std::vector<double> two_x = {0, 1}, two_y = {0, 1};
  EXPECT_TRUE(std::isinf(
      EnvelopeSlopeErrorBound(two_x, two_y, LowerEnvelopeFit(two_x, two_y), 1e-3).either()));
  const std::vector<double> same_x = {4, 4, 4, 4}, ys = {1, 3, 2, 5};
  const SlopeErrorBound b = EnvelopeSlopeErrorBound(same_x, ys, LowerEnvelopeFit(same_x, ys), 1e-3);
  EXPECT_TRUE(std::isinf(b.steep));
  EXPECT_TRUE(std::isinf(b.shallow));
}

// With one probe a second behind 20 ms ± 5 ms, the drift stays 0 under the
// prior until its own bound beats it; from then on it is used with its bound.
TEST(ClockUncertaintyTest, DriftIsUsedOnlyOnceItsBoundBeatsThePrior) {
  Simulation sim(kJittery, kJittery, 80, 4);
  ClockModel model;
  int fitted = 0;
  for (int k = 0; k < 300; ++k) {
    sim.WaitUntil(Duration::Seconds(k));
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
    const ClockEstimate e = model.estimate();
    if (!e.drift_fitted) {
      EXPECT_EQ(e.drift_ppm, 0.0) << "probe " << k;
      EXPECT_EQ(e.drift_error_ppm, 100.0) << "probe " << k;
    } else {
      ++fitted;
      EXPECT_LT(e.drift_error_ppm, 100.0) << "probe " << k;
      EXPECT_LE(std::abs(e.drift_ppm - 80), e.drift_error_ppm) << "probe " << k;  // simulated truth
    }
  }
  EXPECT_FALSE(model.estimate().drift_ppm == 0.0);  // fitted well within 5 minutes
  EXPECT_GT(fitted, 0);
}

// Regression (issue 12): in an outside client's run the drift estimate swung
// between −500 and +480 ppm over the first 30 s (truth +150) and feedback
// landed outside its uncertainty 10–11 s after connecting. Here is a run whose
// early envelope fit is that wrong: the model must not use it, and every event
// from the first second on must lie inside its stated uncertainty.
TEST(ClockUncertaintyTest, ADriftFitThatIsWrongEarlyIsCoveredByTheBound) {
  // Find a seed whose raw fit after 10 probes (1 s apart) is > 100 ppm off.
  uint64_t seed = 0;
  for (uint64_t s = 1; s < 200 && seed == 0; ++s) {
    Simulation sim(kJittery, kJittery, 150, s);
    std::vector<double> fx, fy, bx, by;
    ProbeTimestamps first{};
    for (int k = 0; k <= 10; ++k) {
      sim.WaitUntil(Duration::Seconds(k));
      const ProbeTimestamps p = sim.Probe();
      if (k == 0) first = p;
      fx.push_back(static_cast<double>((p.t1 - first.t1).nanos()));
      fy.push_back(static_cast<double>((p.t2.nanos() - p.t1.nanos()) -
                                       (first.t2.nanos() - first.t1.nanos())));
      bx.push_back(static_cast<double>((p.t4 - first.t4).nanos()));
      by.push_back(static_cast<double>((p.t4.nanos() - p.t3.nanos()) -
                                       (first.t4.nanos() - first.t3.nanos())));
    }
    const Line f = LowerEnvelopeFit(fx, fy), b = LowerEnvelopeFit(bx, by);
    const double raw_ppm = 0.5 * (f.slope - b.slope) * 1e6;
    if (std::abs(raw_ppm - 150) > 100) {
      seed = s;
      // Each slope's own bound covers its error (simulated truth: the
      // forward slope is +150 ppm, the backward one −150 ppm).
      const SlopeErrorBound fb = EnvelopeSlopeErrorBound(fx, fy, f, 1e-4);
      const SlopeErrorBound bb = EnvelopeSlopeErrorBound(bx, by, b, 1e-4);
      EXPECT_LE(f.slope - 150e-6, fb.steep);
      EXPECT_LE(150e-6 - f.slope, fb.shallow);
      EXPECT_LE(b.slope + 150e-6, bb.steep);
      EXPECT_LE(-150e-6 - b.slope, bb.shallow);
    }
  }
  ASSERT_NE(seed, 0u) << "no seed gave a wrong early fit";

  Simulation sim(kJittery, kJittery, 150, seed);
  ClockModel model;
  for (int k = 0; k < 60; ++k) {
    sim.WaitUntil(Duration::Seconds(k));
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
    const ClockEstimate e = model.estimate();
    if (e.drift_fitted) {
      EXPECT_LE(std::abs(e.drift_ppm - 150), e.drift_error_ppm);  // simulated truth
    }
    // Events through the next second, every 50 ms.
    for (int ms = 0; ms < 1000; ms += 50) {
      const Check c = At(model, sim.device(), sim.Now() + Duration::Millis(ms));
      EXPECT_LE(c.error, c.uncertainty) << k << " s + " << ms << " ms";  // simulated truth
    }
  }
}

// The end-to-end case in the model: a +150 ppm clock (beyond the
// 100 ppm prior) behind a LAN link, probed as the server does (20/s for
// 10 s, then 10/s), with an event every 10 ms from 0.1 s to 30 s.
TEST(ClockUncertaintyTest, AClockBeyondThePriorIsCoveredFromTheFirstSecondWithFastProbes) {
  Simulation sim(kLan, kLan, 150, 5);
  ClockModel model;
  Duration next_probe = Duration::Zero();
  int outside = 0, events = 0;
  for (Duration t = Duration::Zero(); t < Duration::Seconds(30); t += Duration::Millis(10)) {
    if (t >= next_probe) {
      sim.WaitUntil(t);
      ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
      next_probe = t + (t < Duration::Seconds(10) ? Duration::Millis(50) : Duration::Millis(100));
    }
    if (t < Duration::Millis(100)) continue;
    const Check c = At(model, sim.device(), sim.Now());
    ++events;
    outside += c.error > c.uncertainty ? 1 : 0;  // simulated truth
  }
  EXPECT_EQ(outside, 0) << "of " << events;
  EXPECT_TRUE(model.estimate().drift_fitted);
  EXPECT_NEAR(model.estimate().drift_ppm, 150, model.estimate().drift_error_ppm);
}

}  // namespace
}  // namespace tickmark::clock_uncertainty_test

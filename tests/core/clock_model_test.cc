// ClockModel against a simulated device: its clock has a known offset and
// drift and sits behind a link with random delays, so every mapping can be
// compared with the truth. Randomness is seeded; session time comes from a
// FakeMonotonic; nothing sleeps or reads a real clock.
#include "server/core/clock_model.h"

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <limits>
#include <utility>
#include <random>
#include <vector>

#include "gtest/gtest.h"
#include "server/core/time.h"

namespace tickmark {
namespace {

// The session's UTC anchor (November 2023).
constexpr int64_t kOpenUtcNs = 1'700'000'000'000'000'000;

// A device clock: offset + drift relative to session time, plus steps.
class SimulatedDeviceClock {
 public:
  SimulatedDeviceClock(SessionTime origin, Duration offset, double drift_ppm)
      : origin_(origin), offset_(offset), drift_(drift_ppm * 1e-6) {}

  ClientTime Read(SessionTime s) const {
    const double since = static_cast<double>((s - origin_).nanos());
    return ClientTime::FromNanos(s.nanos()) + offset_ + step_ +
           Duration::Nanos(std::llround(since * drift_));
  }
  // Inverse of Read(): the session time at which the clock shows c.
  SessionTime TrueSession(ClientTime c) const {
    const ClientTime origin_reading = ClientTime::FromNanos(origin_.nanos());
    const double shown =
        static_cast<double>((c - origin_reading - offset_ - step_).nanos());
    return origin_ + Duration::Nanos(std::llround(shown / (1 + drift_)));
  }
  void Step(Duration d) { step_ += d; }

 private:
  SessionTime origin_;
  Duration offset_;
  double drift_;
  Duration step_;
};

// Uniform one-way delays, each direction on its own range.
struct Link {
  Duration forward_min, forward_max, backward_min, backward_max;
};
// 20 ms ± 5 ms each way.
constexpr Link kSymmetric{Duration::Millis(15), Duration::Millis(25),
                          Duration::Millis(15), Duration::Millis(25)};
// Forward about 5 ms, backward about 25 ms.
constexpr Link kAsymmetric{Duration::Millis(4), Duration::Millis(6),
                           Duration::Millis(22), Duration::Millis(28)};

class Simulation {
 public:
  Simulation(Link link, uint64_t seed)
      : session_(kOpenUtcNs, &mono_),
        device_(session_.Now(), Duration::Millis(3200), 80.0),
        link_(link),
        rng_(seed) {}

  // One probe started now; the session clock advances through it.
  ProbeTimestamps Probe() {
    ProbeTimestamps p;
    p.t1 = session_.Now();
    mono_.Advance(Draw(link_.forward_min, link_.forward_max));
    p.t2 = device_.Read(session_.Now());
    const Duration hold = Draw(Duration::Micros(50), Duration::Micros(500));
    mono_.Advance(hold);
    p.t3 = device_.Read(session_.Now());
    mono_.Advance(Draw(link_.backward_min, link_.backward_max));
    p.t4 = session_.Now();
    return p;
  }
  // Moves the session clock to the next whole-second probe slot.
  void WaitUntil(Duration since_open) {
    mono_.Set(1'000'000'000 + since_open.nanos());
  }

  SimulatedDeviceClock& device() { return device_; }
  SessionTime Now() const { return session_.Now(); }

 private:
  Duration Draw(Duration lo, Duration hi) {
    std::uniform_int_distribution<int64_t> d(lo.nanos(), hi.nanos());
    return Duration::Nanos(d(rng_));
  }

  FakeMonotonic mono_;
  SessionClock session_;
  SimulatedDeviceClock device_;
  Link link_;
  std::mt19937_64 rng_;
};

// Offset error at the device's own readings across the data and a little
// beyond it, compared with the model's uncertainty there.
void ExpectTruthWithinUncertainty(const ClockModel& model,
                                  const SimulatedDeviceClock& device,
                                  SessionTime from, SessionTime to) {
  for (SessionTime s = from; s <= to; s += Duration::Millis(250)) {
    const ClientTime c = device.Read(s);
    const Duration error = model.ToSession(c) - device.TrueSession(c);
    ASSERT_LE(Abs(error), model.UncertaintyAt(c))
        << "at " << (s - from).seconds() << " s: " << error.millis() << " ms";
  }
}

// Minimum clamped delay of the last `stages` accepted probes.
Duration WindowMinDelay(const std::vector<ProbeTimestamps>& accepted,
                        size_t stages) {
  const size_t n = accepted.size();
  Duration best = Duration::Max();
  for (size_t i = n > stages ? n - stages : 0; i < n; ++i) {
    const Duration delay = ComputeOnWire(accepted[i]).delay;
    best = std::min(best, std::max(delay, Duration::Micros(1)));
  }
  return best;
}

TEST(ClockModelTest, EmptyModelIsNotReady) {
  ClockModel model;
  EXPECT_FALSE(model.ready());
  EXPECT_EQ(model.UncertaintyAt(ClientTime::FromNanos(5)), Duration::Max());
  EXPECT_EQ(model.ToSession(ClientTime::FromNanos(5)).nanos(), 5);
  EXPECT_EQ(model.estimate(), ClockEstimate{});
}

TEST(ClockModelTest, SymmetricLinkTracksOffsetAndDrift) {
  Simulation sim(kSymmetric, 20240611);
  ClockModel model;
  std::vector<ProbeTimestamps> accepted;
  const SessionTime start = sim.Now();
  for (int k = 0; k < 60; ++k) {
    sim.WaitUntil(Duration::Seconds(k));
    const ProbeTimestamps p = sim.Probe();
    ASSERT_EQ(model.AddProbe(p), ProbeVerdict::kAccepted) << "probe " << k;
    accepted.push_back(p);

    // Asymmetry can only be bounded, so never below δ_min/2 (docs/architecture.md §4,
    // derived from RFC 5905 §8).
    const Duration floor = WindowMinDelay(accepted, 8) / 2;
    EXPECT_GE(model.estimate().uncertainty, floor);  // derived, RFC 5905 §8
    EXPECT_GE(model.UncertaintyAt(p.t3), floor);     // derived, RFC 5905 §8
    const ClientTime later = p.t3 + Duration::Seconds(30);
    EXPECT_GE(model.UncertaintyAt(later), floor);  // derived, RFC 5905 §8
    // The truth lies within the uncertainty after every probe.
    const Duration error =
        model.ToSession(p.t3) - sim.device().TrueSession(p.t3);
    EXPECT_LE(Abs(error), model.UncertaintyAt(p.t3));  // simulated truth
  }
  ExpectTruthWithinUncertainty(model, sim.device(), start,
                               sim.Now() + Duration::Seconds(10));

  const ClockEstimate e = model.estimate();
  EXPECT_EQ(e.samples, 60);
  // Simulated truth: 3.2 s plus 80 ppm of the time since the anchor.
  const double since_open =
      (e.reference - ClientTime::FromNanos(kOpenUtcNs)).seconds();
  EXPECT_NEAR(e.offset.seconds(), 3.2 + 80e-6 * since_open,
              e.uncertainty.seconds());  // simulated truth
  // A symmetric link leaves an error far below the bound's worst case.
  const ClientTime last = accepted.back().t3;
  const Duration error = model.ToSession(last) - sim.device().TrueSession(last);
  EXPECT_LT(Abs(error), Duration::Millis(5));  // simulated truth
}

struct DriftStats {
  std::vector<double> abs_error_ppm;  // |estimate − 80 ppm|, one per seed
  int covered = 0;  // seeds whose error is within PHI + the model's drift error
  double Quantile(double q) const {
    std::vector<double> v = abs_error_ppm;
    std::sort(v.begin(), v.end());
    return v[static_cast<size_t>(q * static_cast<double>(v.size() - 1))];
  }
};

// Runs `seconds` probes on fresh simulations, one per seed. What is measured
// is the envelope fit itself, so the prior is set to the clamp: the fitted
// drift is used as soon as its error bound is finite and below 500 ppm
// (with the default 100 ppm prior, 1 probe/s on the symmetric link keeps
// the drift at 0 for over a minute; clock_uncertainty_test covers that).
DriftStats RunDrift(Link link, int seeds, int seconds) {
  DriftStats stats;
  for (int seed = 0; seed < seeds; ++seed) {
    Simulation sim(link, static_cast<uint64_t>(seed));
    ClockModel::Options o;
    o.drift_prior_ppm = o.max_drift_ppm;
    ClockModel model(o);
    for (int k = 0; k < seconds; ++k) {
      sim.WaitUntil(Duration::Seconds(k));
      model.AddProbe(sim.Probe());
    }
    const ClockEstimate e = model.estimate();
    const double error = std::abs(e.drift_ppm - 80.0);  // simulated truth
    stats.abs_error_ppm.push_back(error);
    // The uncertainty grows by (PHI + drift error) per unit of distance.
    const Duration far = Duration::Seconds(1000);
    const Duration growth =
        model.UncertaintyAt(e.reference + far) - e.uncertainty;
    const double growth_ppm = growth.seconds() / far.seconds() * 1e6;
    if (error <= growth_ppm + 1e-3) ++stats.covered;
  }
  return stats;
}

// The lower-envelope slope error falls roughly with the square of the span
// (the LP is super-efficient for delays with a sharp floor), so 60 s of 1 Hz
// probes behind ±5 ms of uniform jitter is where it just reaches ~5 ppm:
// over 1000 seeds measured here, median 6.9 ppm, 90th percentile 21 ppm
// after 60 s; after 300 s, maximum 2.5 ppm. A single seeded run would pass
// or fail by luck, so the checks below are over many seeds.
TEST(ClockModelTest, DriftOnSymmetricLinkAfter60s) {
  const DriftStats s = RunDrift(kSymmetric, 100, 60);
  EXPECT_LT(s.Quantile(0.5), 10.0);  // measured here: median 6.9 ppm
  EXPECT_LT(s.Quantile(0.9), 30.0);  // measured here: 90th percentile 21 ppm
  // The model knows roughly how good its drift is: its uncertainty growth
  // (PHI + the fit's own error bound) covers the error: the bound is a real one.
  EXPECT_EQ(s.covered, 100);  // was 96% when the bound was the two fits' disagreement
}

TEST(ClockModelTest, DriftOnSymmetricLinkWithin5PpmAfter300s) {
  const DriftStats s = RunDrift(kSymmetric, 40, 300);
  EXPECT_LT(s.Quantile(1.0), 5.0);  // measured here: max 2.5 over 1000 seeds
  EXPECT_EQ(s.covered, 40);
}

TEST(ClockModelTest, DriftOnAsymmetricLinkAfter60s) {
  // Constant asymmetry cancels in the slopes; the smaller jitter of this link
  // is what makes it converge faster than the symmetric one.
  const DriftStats s = RunDrift(kAsymmetric, 100, 60);
  EXPECT_LT(s.Quantile(0.5), 5.0);
  EXPECT_EQ(s.covered, 100);
}

TEST(ClockModelTest, AsymmetricLinkIsBiasedButWithinUncertainty) {
  Simulation sim(kAsymmetric, 7);
  ClockModel model;
  const SessionTime start = sim.Now();
  for (int k = 0; k < 60; ++k) {
    sim.WaitUntil(Duration::Seconds(k));
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
  }
  ExpectTruthWithinUncertainty(model, sim.device(), start,
                               sim.Now() + Duration::Seconds(10));

  // θ − θ_true = (d_f − d_b)/2 ≈ (5 − 25)/2 ms (derived from RFC 5905 §8): the
  // device looks 10 ms behind, so its readings map about 10 ms late.
  const ClientTime c = sim.device().Read(sim.Now());
  const Duration error = model.ToSession(c) - sim.device().TrueSession(c);
  EXPECT_GT(error, Duration::Millis(7));
  EXPECT_LT(error, Duration::Millis(13));
}

TEST(ClockModelTest, ImpossibleProbesAreRejectedAndChangeNothing) {
  Simulation sim(kSymmetric, 99);
  ClockModel model;
  for (int k = 0; k < 20; ++k) {
    sim.WaitUntil(Duration::Seconds(k));
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
  }
  const ClockEstimate before = model.estimate();
  const ClientTime probe_at = sim.device().Read(sim.Now());
  const SessionTime mapped_before = model.ToSession(probe_at);
  const Duration uncertainty_before = model.UncertaintyAt(probe_at);

  sim.WaitUntil(Duration::Seconds(20));
  const ProbeTimestamps good = sim.Probe();

  ProbeTimestamps reply_before_request = good;  // T3 < T2
  std::swap(reply_before_request.t2, reply_before_request.t3);
  EXPECT_EQ(model.AddProbe(reply_before_request),
            ProbeVerdict::kRejectedReversed);

  ProbeTimestamps back_in_time = good;  // T4 < T1
  std::swap(back_in_time.t1, back_in_time.t4);
  EXPECT_EQ(model.AddProbe(back_in_time), ProbeVerdict::kRejectedReversed);

  // The device claims a hold 1 s longer than the whole round trip.
  ProbeTimestamps negative_delay = good;
  negative_delay.t3 = negative_delay.t2 + Duration::Seconds(1);
  EXPECT_LT(ComputeOnWire(negative_delay).delay, -Duration::Millis(900));
  EXPECT_EQ(model.AddProbe(negative_delay),
            ProbeVerdict::kRejectedNegativeDelay);

  EXPECT_EQ(model.estimate(), before);
  EXPECT_EQ(model.ToSession(probe_at), mapped_before);
  EXPECT_EQ(model.UncertaintyAt(probe_at), uncertainty_before);

  EXPECT_EQ(model.AddProbe(good), ProbeVerdict::kAccepted);
  EXPECT_EQ(model.estimate().samples, before.samples + 1);
}

TEST(ClockModelTest, ClockJumpRestartsModel) {
  Simulation sim(kSymmetric, 31337);
  ClockModel model;
  for (int k = 0; k < 30; ++k) {
    sim.WaitUntil(Duration::Seconds(k));
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
  }
  ASSERT_EQ(model.estimate().samples, 30);

  sim.device().Step(Duration::Seconds(2));  // e.g. the device's NTP stepped it
  sim.WaitUntil(Duration::Seconds(30));
  // The first probe after the step is held back; the next one confirms it.
  const ClockEstimate before = model.estimate();
  EXPECT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kRejectedUnconfirmedJump);
  EXPECT_EQ(model.estimate(), before);
  sim.WaitUntil(Duration::Seconds(31));
  EXPECT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kClockJump);
  EXPECT_EQ(model.estimate().samples, 2);
  EXPECT_EQ(model.estimate().drift_ppm, 0.0);  // too short a span to fit yet

  const SessionTime restart = sim.Now();
  for (int k = 32; k < 60; ++k) {
    sim.WaitUntil(Duration::Seconds(k));
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted)
        << "probe " << k;
  }
  EXPECT_EQ(model.estimate().samples, 30);
  // Simulated truth: 3.2 s + the 2 s step + under 5 ms of drift.
  EXPECT_NEAR(model.estimate().offset.seconds(), 5.2, 0.03);
  ExpectTruthWithinUncertainty(model, sim.device(), restart,
                               sim.Now() + Duration::Seconds(5));
}

TEST(ClockModelTest, DelayOutlierIsNotAJump) {
  Simulation sim(kSymmetric, 5);
  ClockModel model;
  for (int k = 0; k < 10; ++k) {
    sim.WaitUntil(Duration::Seconds(k));
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
  }
  // A reply stuck 3 s in a queue: the offset is off by up to 1.5 s, which
  // its own delay explains.
  sim.WaitUntil(Duration::Seconds(10));
  ProbeTimestamps slow = sim.Probe();
  slow.t4 += Duration::Seconds(3);
  EXPECT_EQ(model.AddProbe(slow), ProbeVerdict::kAccepted);
  EXPECT_EQ(model.estimate().samples, 11);
  EXPECT_LT(model.estimate().min_delay, Duration::Millis(60));  // filtered out
}

TEST(ClockModelTest, OldProbesLeaveTheWindowButFilterStagesStay) {
  ClockModel::Options o;
  // Between two probe slots, so the count does not depend on the delays.
  o.drift_window = Duration::Millis(10'500);
  ClockModel model(o);
  Simulation sim(kSymmetric, 11);
  for (int k = 0; k < 30; ++k) {
    sim.WaitUntil(Duration::Seconds(k));
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
  }
  EXPECT_EQ(model.estimate().samples, 11);  // T4 within 10.5 s of the newest

  // Sparse probes: the window would hold one, the filter keeps eight.
  for (int k = 0; k < 12; ++k) {
    sim.WaitUntil(Duration::Seconds(100 + 60 * k));
    ASSERT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
  }
  EXPECT_EQ(model.estimate().samples, 8);
}

TEST(MinDelaySampleTest, PrefersTheNewestOnATie) {
  const std::vector<OnWire> samples = {
      {Duration::Millis(1), Duration::Millis(20)},
      {Duration::Millis(2), Duration::Millis(20)},
      {Duration::Millis(3), Duration::Millis(25)}};
  EXPECT_EQ(MinDelaySample(samples).offset, Duration::Millis(2));
  EXPECT_EQ(MinDelaySample({}).delay, Duration::Max());
}

TEST(LowerEnvelopeFitTest, DegenerateInputs) {
  EXPECT_EQ(LowerEnvelopeFit({}, {}).slope, 0.0);
  const std::vector<double> one_x = {3}, one_y = {7};
  EXPECT_EQ(LowerEnvelopeFit(one_x, one_y).intercept, 7.0);
  const std::vector<double> same_x = {2, 2, 2}, ys = {5, 1, 3};
  const Line flat = LowerEnvelopeFit(same_x, ys);
  EXPECT_EQ(flat.slope, 0.0);
  EXPECT_EQ(flat.intercept, 1.0);
  // Mean x on a hull vertex: both edges are optimal; we return the mean slope.
  const std::vector<double> vx = {0, 1, 2}, vy = {1, 0, 2};
  const Line v = LowerEnvelopeFit(vx, vy);
  EXPECT_DOUBLE_EQ(v.slope, 0.5);       // mean of −1 and 2
  EXPECT_DOUBLE_EQ(v.intercept, -0.5);  // through (1, 0)
}

// The fit must equal the best line through two data points that stays under
// all points (an LP optimum sits on a vertex of the feasible region; with two
// unknowns that means two tight constraints). Brute force over every pair.
// Common practice, no source.
TEST(LowerEnvelopeFitTest, MatchesBruteForceOptimum) {
  std::mt19937_64 rng(42);
  std::uniform_real_distribution<double> noise(0.0, 5.0);
  for (int trial = 0; trial < 200; ++trial) {
    const int n = 3 + trial % 20;
    std::vector<double> x, y;
    for (int i = 0; i < n; ++i) {
      x.push_back(i + noise(rng) * 0.1);
      y.push_back(0.3 * i + noise(rng));
    }
    double mean_x = 0;
    for (double xi : x) mean_x += xi;
    mean_x /= n;
    auto feasible = [&](double a, double b) {
      for (int i = 0; i < n; ++i) {
        if (a * x[i] + b > y[i] + 1e-9) return false;
      }
      return true;
    };
    double best = -1e300;
    for (int i = 0; i < n; ++i) {
      for (int j = i + 1; j < n; ++j) {
        if (x[i] == x[j]) continue;
        const double a = (y[j] - y[i]) / (x[j] - x[i]);
        const double b = y[i] - a * x[i];
        if (feasible(a, b)) best = std::max(best, a * mean_x + b);
      }
    }
    const Line fit = LowerEnvelopeFit(x, y);
    ASSERT_TRUE(feasible(fit.slope, fit.intercept)) << "trial " << trial;
    const double at_mean = fit.slope * mean_x + fit.intercept;
    EXPECT_NEAR(at_mean, best, 1e-9) << "trial " << trial;
  }
}

TEST(ProbeVerdictNameTest, Names) {
  EXPECT_STREQ(ProbeVerdictName(ProbeVerdict::kAccepted), "accepted");
  EXPECT_STREQ(ProbeVerdictName(ProbeVerdict::kRejectedReversed),
               "rejected_reversed");
  EXPECT_STREQ(ProbeVerdictName(ProbeVerdict::kRejectedNegativeDelay),
               "rejected_negative_delay");
  EXPECT_STREQ(ProbeVerdictName(ProbeVerdict::kClockJump), "clock_jump");
  EXPECT_STREQ(ProbeVerdictName(ProbeVerdict::kRejectedOutOfRange), "rejected_out_of_range");
  EXPECT_STREQ(ProbeVerdictName(ProbeVerdict::kRejectedUnconfirmedJump),
               "rejected_unconfirmed_jump");
}

constexpr int64_t kMin = std::numeric_limits<int64_t>::min();
constexpr int64_t kMax = std::numeric_limits<int64_t>::max();

// A model fed 20 good probes, one a second, and what it says before any
// absurd probe arrives.
struct ReadyModel {
  explicit ReadyModel(uint64_t seed) : sim(kSymmetric, seed) {
    for (int k = 0; k < 20; ++k) {
      sim.WaitUntil(Duration::Seconds(k));
      EXPECT_EQ(model.AddProbe(sim.Probe()), ProbeVerdict::kAccepted);
    }
    probe_at = sim.device().Read(sim.Now());
    before = model.estimate();
    mapped_before = model.ToSession(probe_at);
    uncertainty_before = model.UncertaintyAt(probe_at);
  }
  void ExpectUnmoved() const {
    EXPECT_EQ(model.estimate(), before);
    EXPECT_EQ(model.ToSession(probe_at), mapped_before);
    EXPECT_EQ(model.UncertaintyAt(probe_at), uncertainty_before);
  }
  Simulation sim;
  ClockModel model;
  ClientTime probe_at;
  ClockEstimate before;
  SessionTime mapped_before;
  Duration uncertainty_before;
};

// Regression (issue 9.5): T3 − T2 wrapped, the probe was accepted and the
// next feedback landed thousands of seconds off.
TEST(ClockModelOverflowTest, ProbeWithT2MinAndT3MaxIsRejectedAndMovesNothing) {
  ReadyModel m(77);
  m.sim.WaitUntil(Duration::Seconds(20));
  ProbeTimestamps absurd = m.sim.Probe();
  absurd.t2 = ClientTime::FromNanos(kMin);
  absurd.t3 = ClientTime::FromNanos(kMax);
  EXPECT_FALSE(CheckedOnWire(absurd).has_value());
  EXPECT_EQ(m.model.AddProbe(absurd), ProbeVerdict::kRejectedOutOfRange);
  m.ExpectUnmoved();

  // The next real feedback still maps to the truth, within a few ms.
  m.sim.WaitUntil(Duration::Seconds(21));
  ASSERT_EQ(m.model.AddProbe(m.sim.Probe()), ProbeVerdict::kAccepted);
  const ClientTime event = m.sim.device().Read(m.sim.Now());
  const Duration error = m.model.ToSession(event) - m.sim.device().TrueSession(event);
  EXPECT_LE(Abs(error), m.model.UncertaintyAt(event));
  EXPECT_LT(m.model.UncertaintyAt(event), Duration::Millis(100));
}

TEST(ClockModelOverflowTest, ProbeWithT2AndT3MaxIsRejectedAndMovesNothing) {
  ReadyModel m(78);
  m.sim.WaitUntil(Duration::Seconds(20));
  ProbeTimestamps absurd = m.sim.Probe();
  absurd.t2 = ClientTime::FromNanos(kMax);
  absurd.t3 = ClientTime::FromNanos(kMax);
  EXPECT_EQ(m.model.AddProbe(absurd), ProbeVerdict::kRejectedOutOfRange);
  m.ExpectUnmoved();
}

TEST(ClockModelOverflowTest, AbsurdProbesNeverMakeAFreshModelReady) {
  FakeMonotonic mono;
  SessionClock session(kOpenUtcNs, &mono);
  const SessionTime t1 = session.Now();
  const SessionTime t4 = t1 + Duration::Millis(40);
  ClockModel model;
  for (auto [t2, t3] : {std::pair{kMin, kMax}, std::pair{kMax, kMax}, std::pair{kMin, kMin},
                        std::pair{kMin, kMin + 1}}) {
    const ProbeTimestamps p{t1, ClientTime::FromNanos(t2), ClientTime::FromNanos(t3), t4};
    EXPECT_EQ(model.AddProbe(p), ProbeVerdict::kRejectedOutOfRange) << t2 << " " << t3;
    EXPECT_FALSE(model.ready());
  }
  // Session times from outside too (a replayed ledger): T4 − T1 overflows.
  const ProbeTimestamps wide{SessionTime::FromNanos(kMin), ClientTime::FromNanos(0),
                             ClientTime::FromNanos(1), SessionTime::FromNanos(kMax)};
  EXPECT_EQ(model.AddProbe(wide), ProbeVerdict::kRejectedOutOfRange);
  EXPECT_FALSE(model.ready());
}

TEST(ClockModelOverflowTest, ComputeOnWireIsDefinedForAnyTimestamps) {
  const ProbeTimestamps p{SessionTime::FromNanos(kOpenUtcNs), ClientTime::FromNanos(kMin),
                          ClientTime::FromNanos(kMax), SessionTime::FromNanos(kOpenUtcNs + 1)};
  const OnWire w = ComputeOnWire(p);  // saturated, for the record only
  EXPECT_LT(w.delay, -Duration::Seconds(1'000'000'000));
  // Offsets that fit are exact even when the sum of the halves does not.
  const ProbeTimestamps far{SessionTime::FromNanos(-4'000'000'000'000'000'000),
                            ClientTime::FromNanos(4'000'000'000'000'000'000),
                            ClientTime::FromNanos(4'000'000'000'000'000'000),
                            SessionTime::FromNanos(-4'000'000'000'000'000'000)};
  ASSERT_TRUE(CheckedOnWire(far).has_value());
  EXPECT_EQ(CheckedOnWire(far)->offset.nanos(), 8'000'000'000'000'000'000);
  ClockModel model;
  EXPECT_EQ(model.AddProbe(far), ProbeVerdict::kRejectedOutOfRange);  // > max_abs_offset
}

// Regression: one probe far from the model restarted it on its own.
TEST(ClockModelOverflowTest, OneAbsurdProbeInRangeIsHeldNotAJump) {
  ReadyModel m(79);
  m.sim.WaitUntil(Duration::Seconds(20));
  ProbeTimestamps absurd = m.sim.Probe();
  const Duration years = Duration::Seconds(50LL * 365 * 86400);
  absurd.t2 += years;
  absurd.t3 += years;
  EXPECT_EQ(m.model.AddProbe(absurd), ProbeVerdict::kRejectedUnconfirmedJump);
  m.ExpectUnmoved();
  // The next good probe does not confirm it: accepted, no restart.
  m.sim.WaitUntil(Duration::Seconds(21));
  EXPECT_EQ(m.model.AddProbe(m.sim.Probe()), ProbeVerdict::kAccepted);
  EXPECT_EQ(m.model.estimate().samples, m.before.samples + 1);
  // Two absurd probes that disagree with each other never restart it either.
  for (int k = 22; k < 26; ++k) {
    m.sim.WaitUntil(Duration::Seconds(k));
    ProbeTimestamps p = m.sim.Probe();
    p.t2 += years + Duration::Seconds(1000 * k);
    p.t3 += years + Duration::Seconds(1000 * k);
    EXPECT_EQ(m.model.AddProbe(p), ProbeVerdict::kRejectedUnconfirmedJump) << k;
  }
  EXPECT_EQ(m.model.estimate().samples, m.before.samples + 1);
}

// Regression: ToSession took t − reference in int64, so a client time far
// from the reference wrapped and mapped to the wrong side of the timeline.
TEST(ClockModelOverflowTest, MappingOfExtremeClientTimesIsMonotoneAndDefined) {
  ReadyModel m(80);
  const ClockEstimate est = m.model.estimate();
  const std::vector<int64_t> readings = {kMin,
                                         kMin + 1,
                                         -1'000'000'000'000'000'000,
                                         0,
                                         est.reference.nanos(),
                                         est.reference.nanos() + 1,
                                         4'000'000'000'000'000'000,
                                         kMax - 1,
                                         kMax};
  SessionTime previous = SessionTime::FromNanos(kMin);
  for (int64_t r : readings) {
    const ClientTime c = ClientTime::FromNanos(r);
    const SessionTime s = m.model.ToSession(c);
    EXPECT_GE(s, previous) << "reading " << r;
    previous = s;
    // Far from the reference the mapping is within 0.1 % of the plain
    // distance (drift ≤ 500 ppm) and the uncertainty is enormous, not wrapped.
    const double distance = static_cast<double>(r) - static_cast<double>(est.reference.nanos());
    const double moved = static_cast<double>(s.nanos()) -
                         static_cast<double>(m.model.ToSession(est.reference).nanos());
    if (std::abs(distance) > 1e18 && s.nanos() != kMin && s.nanos() != kMax) {
      EXPECT_NEAR(moved / distance, 1.0, 1e-3) << "reading " << r;
    }
    const Duration u = m.model.UncertaintyAt(c);
    EXPECT_GT(u, Duration::Zero());
    if (std::abs(distance) > 1e18) {
      EXPECT_GT(u, Duration::Seconds(1000)) << "reading " << r;
    }
  }
  EXPECT_LT(m.model.ToSession(ClientTime::FromNanos(kMin)),
            m.model.ToSession(ClientTime::FromNanos(0)));
}

}  // namespace
}  // namespace tickmark

// Clock estimation checked against outside sources. Each check names its
// source on the line.
//
// Roles: the server starts probes, so it is RFC 5905's requester ("client":
// T1, T4 on its clock = session time) and the device is the RFC's responder
// ("server": T2, T3 on the device clock). The RFC's θ, "the amount to add to
// the requester's clock", is then device clock − session time: exactly our
// OnWire::offset. Published vectors whose T1/T4 are the requester's clock map
// onto ProbeTimestamps unchanged.
#include <array>
#include <cstdint>
#include <vector>

#include "gtest/gtest.h"
#include "server/core/clock_model.h"
#include "server/core/time.h"

namespace tickmark {
namespace {

constexpr int64_t kNsPerSec = 1'000'000'000;

SessionTime S(double seconds) {
  return SessionTime::FromNanos(Duration::FromSeconds(seconds).nanos());
}
ClientTime C(double seconds) {
  return ClientTime::FromNanos(Duration::FromSeconds(seconds).nanos());
}

TEST(ClockReferenceTest, Rfc5905Section8TestVector) {
  // Requester (our server) stamps T1, T4; responder (our device) T2, T3.
  const ProbeTimestamps p{S(0.410634), C(0.415284), C(0.415471), S(0.430596)};
  // Published vector: δ = 0.019775 s, θ = −0.0052375 s.
  const OnWire w = ComputeOnWire(p);
  EXPECT_EQ(w.delay, Duration::Nanos(19'775'000));   // RFC 5905 §8
  EXPECT_EQ(w.offset, Duration::Nanos(-5'237'500));  // RFC 5905 §8
}

TEST(ClockReferenceTest, Rfc5905Section8AtEpochScaleStaysExact) {
  // Same vector with both clocks near today's epoch: first-order differences
  // in int64 keep it exact (RFC 5905 §8 advises first-order differences).
  const int64_t session_base = 1'700'000'000 * kNsPerSec;
  const int64_t client_base = 1'650'000'000 * kNsPerSec;
  const ProbeTimestamps p{SessionTime::FromNanos(session_base + 410'634'000),
                          ClientTime::FromNanos(client_base + 415'284'000),
                          ClientTime::FromNanos(client_base + 415'471'000),
                          SessionTime::FromNanos(session_base + 430'596'000)};
  // A common base leaves δ unchanged and adds the base difference to θ.
  const OnWire w = ComputeOnWire(p);
  const Duration base_offset = Duration::Nanos(client_base - session_base);
  EXPECT_EQ(w.delay, Duration::Nanos(19'775'000));  // RFC 5905 §8
  EXPECT_EQ(w.offset, base_offset - Duration::Nanos(5'237'500));  // RFC 5905 §8
}

TEST(ClockReferenceTest, AsymmetryErrorIsHalfTheDelayDifference) {
  // True offset 0.5 s, forward 10 ms, back 30 ms, device holds 2 ms.
  const double true_offset = 0.5;
  const ProbeTimestamps p{S(0.0), C(0.010 + true_offset),
                          C(0.012 + true_offset), S(0.042)};
  // Derived vector: θ = 0.490, δ = 0.040, θ − θ_true = (d_f − d_b)/2.
  const OnWire w = ComputeOnWire(p);
  EXPECT_EQ(w.offset, Duration::Millis(490));  // derived, RFC 5905 §8
  EXPECT_EQ(w.delay, Duration::Millis(40));    // derived, RFC 5905 §8
  const Duration error = w.offset - Duration::FromSeconds(true_offset);
  const Duration half_asymmetry =
      (Duration::Millis(10) - Duration::Millis(30)) / 2;
  EXPECT_EQ(error, half_asymmetry);    // derived, RFC 5905 §8
  EXPECT_LE(Abs(error), w.delay / 2);  // derived: |error| ≤ δ/2

  // The model's uncertainty must cover this error it cannot see.
  ClockModel model;
  ASSERT_EQ(model.AddProbe(p), ProbeVerdict::kAccepted);
  const ClientTime mid = p.t2 + (p.t3 - p.t2) / 2;
  const SessionTime truth =
      SessionTime::FromNanos(mid.nanos()) - Duration::FromSeconds(true_offset);
  const Duration model_error = model.ToSession(mid) - truth;
  EXPECT_LE(Abs(model_error), model.UncertaintyAt(mid));  // derived: ≤ δ/2
}

TEST(ClockReferenceTest, FrequencyErrorGivesNegativeApparentDelay) {
  // No network delay; the device clock runs 100 ppm fast; T4 − T1 = 64 s,
  // nearly all of it the device's hold.
  const int64_t base = 1'700'000'000 * kNsPerSec;
  const SessionTime t1 = SessionTime::FromNanos(base);
  const SessionTime t4 = t1 + Duration::Seconds(64);
  const ClientTime t2 = ClientTime::FromNanos(base + 7 * kNsPerSec);
  // The device counts 64 s·(1 + 100e-6) of hold.
  const ClientTime t3 = t2 + Duration::Seconds(64) + Duration::Micros(6400);
  const ProbeTimestamps p{t1, t2, t3, t4};
  // Published: 100 ppm over 64 s gives an apparent delay of −6.4 ms.
  EXPECT_EQ(ComputeOnWire(p).delay, Duration::Micros(-6400));  // RFC 5905 §8

  // Far below −precision: the model rejects it and stays empty.
  ClockModel strict;  // precision 1 µs
  // RFC 5905 §8 only clamps; rejecting beyond −precision is our choice.
  EXPECT_EQ(strict.AddProbe(p), ProbeVerdict::kRejectedNegativeDelay);
  EXPECT_FALSE(strict.ready());

  // Within the precision: δ is clamped up to the precision (RFC 5905 §8).
  ClockModel::Options coarse_options;
  coarse_options.precision = Duration::Millis(10);
  ClockModel coarse(coarse_options);
  EXPECT_EQ(coarse.AddProbe(p), ProbeVerdict::kAccepted);
  EXPECT_EQ(coarse.estimate().min_delay, Duration::Millis(10));  // RFC 5905 §8

  // A sub-precision negative δ is clamped too.
  const ClientTime t3_tiny = t2 + Duration::Seconds(64) + Duration::Nanos(500);
  const ProbeTimestamps tiny{t1, t2, t3_tiny, t4};
  ClockModel fine;
  EXPECT_EQ(fine.AddProbe(tiny), ProbeVerdict::kAccepted);
  EXPECT_EQ(fine.estimate().min_delay, Duration::Micros(1));  // RFC 5905 §8
}

TEST(ClockReferenceTest, Section10ClockFilterPicksMinimumDelay) {
  // Derived vector for the published filter: → offset 0.5 ms, delay 26.5 ms.
  const std::array<double, 8> offset_ms = {1.2, 3.0, 0.9, 2.1,
                                           0.5, 4.0, 1.1, 1.6};
  const std::array<double, 8> delay_ms = {30.0, 45.0, 28.0, 39.0,
                                          26.5, 60.0, 31.0, 33.0};
  std::vector<OnWire> samples;
  for (size_t i = 0; i < offset_ms.size(); ++i) {
    samples.push_back(OnWire{Duration::FromSeconds(offset_ms[i] * 1e-3),
                             Duration::FromSeconds(delay_ms[i] * 1e-3)});
  }
  const OnWire best = MinDelaySample(samples);
  EXPECT_EQ(best.offset, Duration::Micros(500));    // RFC 5905 §10
  EXPECT_EQ(best.delay, Duration::Micros(26'500));  // RFC 5905 §10
}

TEST(ClockReferenceTest, LowerEnvelopeFitDiffersFromLeastSquares) {
  const std::vector<double> x = {0, 1, 2, 3, 4, 5, 6, 7};
  const std::vector<double> y = {10, 12, 11, 13, 12.5, 14, 12.8, 15};
  // Derived vector for the published LP: slope 0.46667, intercept 10; least
  // squares would give 0.56548, 10.5583.
  const Line envelope = LowerEnvelopeFit(x, y);
  EXPECT_NEAR(envelope.slope, 0.46667, 5e-6);   // Moon et al. INFOCOM 1999
  EXPECT_NEAR(envelope.intercept, 10.0, 1e-9);  // Moon et al. INFOCOM 1999
  for (size_t i = 0; i < x.size(); ++i) {
    // The LP's constraint: the line lies under every point.
    const double at = envelope.slope * x[i] + envelope.intercept;
    EXPECT_LE(at, y[i] + 1e-9);  // Moon et al. INFOCOM 1999
  }

  // Ordinary least squares, by its textbook formula, on the same points.
  double mx = 0, my = 0;
  for (size_t i = 0; i < x.size(); ++i) {
    mx += x[i];
    my += y[i];
  }
  mx /= static_cast<double>(x.size());
  my /= static_cast<double>(y.size());
  double sxy = 0, sxx = 0;
  for (size_t i = 0; i < x.size(); ++i) {
    sxy += (x[i] - mx) * (y[i] - my);
    sxx += (x[i] - mx) * (x[i] - mx);
  }
  const double ols_slope = sxy / sxx;
  EXPECT_NEAR(ols_slope, 0.56548, 5e-6);            // derived vector
  EXPECT_NEAR(my - ols_slope * mx, 10.5583, 5e-5);  // derived vector
  EXPECT_GT(ols_slope - envelope.slope, 0.09);      // derived vector
}

TEST(ClockReferenceTest, Ieee1588AgreesWithRfc5905WhenSymmetric) {
  // IEEE 1588 delay request–response with the session clock as master and the
  // device as slave: t1 Sync sent (master), t2 received (slave), t3 Delay_Req
  // sent (slave), t4 received (master) — the same four instants as a probe.
  const double true_offset = 0.25;  // slave − master
  const double one_way = 0.012;
  const SessionTime t1 = S(100.0);
  const ClientTime t2 = C(100.0 + one_way + true_offset);
  const ClientTime t3 = t2 + Duration::Millis(3);
  const SessionTime t4 = S(100.0 + one_way + 0.003 + one_way);

  const int64_t ms = t2.nanos() - t1.nanos();
  const int64_t sm = t4.nanos() - t3.nanos();
  // IEEE 1588: meanPathDelay = ((t2 − t1) + (t4 − t3)) / 2,
  //            offsetFromMaster = ((t2 − t1) − (t4 − t3)) / 2.
  const Duration mean_path_delay = Duration::Nanos((ms + sm) / 2);
  const Duration offset_from_master = Duration::Nanos((ms - sm) / 2);

  const OnWire w = ComputeOnWire(ProbeTimestamps{t1, t2, t3, t4});
  EXPECT_EQ(w.offset, offset_from_master);  // IEEE 1588 = RFC 5905 §8
  EXPECT_EQ(w.delay, mean_path_delay * 2);  // IEEE 1588 = RFC 5905 §8
  // On a symmetric path both are exact.
  const Duration truth = Duration::FromSeconds(true_offset);
  EXPECT_EQ(w.offset, truth);                                  // IEEE 1588
  EXPECT_EQ(mean_path_delay, Duration::FromSeconds(one_way));  // IEEE 1588
}

}  // namespace
}  // namespace tickmark

// Retiming against a simulated device whose clock is known exactly: probes and
// events go over a link with random one-way delays, the live ClockModel maps
// each event as the server would have when it arrived, and RetimeClock then
// recomputes every event with all probes. The checks: the truth lies inside
// every retimed uncertainty (the bound's derivation rests only on the RFC 5905
// §8 timestamp roles and non-negative one-way delays), retimed errors are no
// worse than live ones, and jumps, few probes and contradictory probes are
// handled. Randomness is seeded; nothing reads a real clock.
#include "server/core/retime.h"

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <limits>
#include <optional>
#include <random>
#include <vector>

#include "gtest/gtest.h"
#include "server/core/clock_model.h"
#include "server/core/time.h"

namespace tickmark::retime_test {
namespace {

// The session's UTC anchor (November 2023).
constexpr int64_t kOpenUtcNs = 1'700'000'000'000'000'000;
const SessionTime kOrigin = SessionTime::FromNanos(kOpenUtcNs);

// A device clock: offset + constant drift against session time, and an
// optional step at one session instant.
class DeviceClock {
 public:
  DeviceClock(Duration offset, double drift_ppm) : offset_(offset), drift_(drift_ppm * 1e-6) {}
  void StepAt(SessionTime at, Duration by) {
    step_at_ = at;
    step_ = by;
  }
  ClientTime Read(SessionTime s) const {
    const double since = static_cast<double>((s - kOrigin).nanos());
    Duration step = s >= step_at_ ? step_ : Duration::Zero();
    return ClientTime::FromNanos(s.nanos()) + offset_ + step +
           Duration::Nanos(std::llround(since * drift_));
  }

 private:
  Duration offset_;
  double drift_;
  // No step: an instant no simulation reaches (an optional here drew a
  // false -Wmaybe-uninitialized from GCC 12 at -O1).
  SessionTime step_at_ = SessionTime::FromNanos(std::numeric_limits<int64_t>::max());
  Duration step_;
};

// Uniform one-way delays, each direction on its own range.
struct Link {
  Duration forward_min, forward_max, backward_min, backward_max;
};
// 20 ms ± 5 ms each way.
constexpr Link kSymmetric{Duration::Millis(15), Duration::Millis(25), Duration::Millis(15),
                          Duration::Millis(25)};
// Forward about 5 ms, backward about 25 ms: (d_f − d_b)/2 ≈ −10 ms that no
// round trip can see (RFC 5905 §8).
constexpr Link kAsymmetric{Duration::Millis(4), Duration::Millis(6), Duration::Millis(22),
                           Duration::Millis(28)};
// A LAN: 1 ms ± 0.1 ms.
constexpr Link kLan{Duration::Micros(900), Duration::Micros(1100), Duration::Micros(900),
                    Duration::Micros(1100)};

struct Options {
  Link link = kSymmetric;
  Duration offset = Duration::Millis(3200);
  double drift_ppm = 80;
  Duration length = Duration::Seconds(120);
  Duration event_every = Duration::Millis(370);
  std::optional<Duration> jump_at;  // after the hello
  Duration jump;
  bool pass_live_flags = true;  // restart/candidate as the live model decided
};

struct SimRun {
  std::vector<RetimeProbe> probes;  // as the ledger would list them
  std::vector<RetimeEvent> events;
  std::vector<SessionTime> truth;  // per event
};

// One connection: the server's probe schedule (a burst of 8 at 50 ms, then
// one per second, one outstanding at a time, as LiveService::Options), events
// stamped on the device and mapped live on arrival.
SimRun Simulate(const Options& o, uint64_t seed) {
  std::mt19937_64 rng(seed);
  auto draw = [&](Duration lo, Duration hi) {
    return Duration::Nanos(std::uniform_int_distribution<int64_t>(lo.nanos(), hi.nanos())(rng));
  };
  DeviceClock clock(o.offset, o.drift_ppm);
  if (o.jump_at) clock.StepAt(kOrigin + *o.jump_at, o.jump);

  std::vector<ProbeTimestamps> exchanges;
  SessionTime due = kOrigin;
  SessionTime free = kOrigin;
  const SessionTime end = kOrigin + o.length + Duration::Seconds(5);
  for (int k = 0; due < end; ++k) {
    const SessionTime t1 = std::max(due, free);
    const SessionTime at_client = t1 + draw(o.link.forward_min, o.link.forward_max);
    const SessionTime reply = at_client + Duration::Micros(50);
    const SessionTime t4 = reply + draw(o.link.backward_min, o.link.backward_max);
    exchanges.push_back({t1, clock.Read(at_client), clock.Read(reply), t4});
    due = t1 + (k < 8 ? Duration::Millis(50) : Duration::Seconds(1));
    free = t4;
  }

  SimRun run;
  ClockModel model;
  size_t next_probe = 0;
  auto add_probe = [&] {
    const ProbeTimestamps& p = exchanges[next_probe++];
    const ProbeVerdict v = model.AddProbe(p);
    if (v == ProbeVerdict::kAccepted || v == ProbeVerdict::kClockJump) {
      run.probes.push_back({p, o.pass_live_flags && v == ProbeVerdict::kClockJump, false});
    } else if (v == ProbeVerdict::kRejectedUnconfirmedJump) {
      run.probes.push_back({p, false, o.pass_live_flags});
    }
  };
  for (SessionTime e = kOrigin + Duration::Millis(100); e < kOrigin + o.length;
       e += o.event_every) {
    const ClientTime stamped = clock.Read(e);
    SessionTime arrival = e + draw(o.link.forward_min, o.link.forward_max);
    while (next_probe < exchanges.size() && exchanges[next_probe].t4 <= arrival) add_probe();
    // Messages wait for the first probe (LiveService::Options::clock_wait).
    while (!model.ready()) {
      arrival = exchanges[next_probe].t4;
      add_probe();
    }
    run.events.push_back({stamped, model.ToSession(stamped), model.UncertaintyAt(stamped),
                          run.probes.size(), arrival});
    run.truth.push_back(e);
  }
  while (next_probe < exchanges.size()) add_probe();
  return run;
}

double Percentile(std::vector<double> v, double q) {
  std::sort(v.begin(), v.end());
  return v[static_cast<size_t>(q * static_cast<double>(v.size() - 1))];
}

struct Tally {
  std::vector<double> live_error_ms, retimed_error_ms, live_u_ms, retimed_u_ms;
  int outside = 0;  // truth outside the retimed uncertainty
  int kept = 0;     // not retimed
  int events = 0;
};

void Check(const Options& o, int runs, Tally* t) {
  for (int seed = 1; seed <= runs; ++seed) {
    SimRun run = Simulate(o, static_cast<uint64_t>(seed));
    const std::vector<RetimedTime> out = RetimeClock(run.probes, run.events);
    ASSERT_EQ(out.size(), run.events.size());
    for (size_t i = 0; i < out.size(); ++i) {
      ++t->events;
      if (out[i].outcome != RetimeOutcome::kRetimed) ++t->kept;
      const Duration err = Abs(out[i].session - run.truth[i]);
      if (err > out[i].uncertainty) {
        ++t->outside;
        ADD_FAILURE() << "seed " << seed << " event " << i << ": error " << err.millis()
                      << " ms outside the retimed uncertainty " << out[i].uncertainty.millis()
                      << " ms";
      }
      t->retimed_error_ms.push_back(err.millis());
      t->live_error_ms.push_back(Abs(run.events[i].live - run.truth[i]).millis());
      t->retimed_u_ms.push_back(out[i].uncertainty.millis());
      t->live_u_ms.push_back(run.events[i].live_uncertainty.millis());
    }
  }
}

TEST(RetimeTest, SymmetricLinkHoldsTheTruthAndBeatsTheLiveMapping) {
  Tally t;
  Check(Options{}, 20, &t);
  EXPECT_EQ(t.outside, 0);
  EXPECT_EQ(t.kept, 0);
  // Two-sided bounds are never worse than extrapolating from one side: the
  // error quantiles and the stated uncertainty both shrink.
  EXPECT_LE(Percentile(t.retimed_error_ms, 0.5), Percentile(t.live_error_ms, 0.5));
  EXPECT_LE(Percentile(t.retimed_error_ms, 0.95), Percentile(t.live_error_ms, 0.95));
  EXPECT_LT(Percentile(t.retimed_u_ms, 0.5), Percentile(t.live_u_ms, 0.5));
  EXPECT_LT(Percentile(t.retimed_u_ms, 0.95), Percentile(t.live_u_ms, 0.95));
  // Round trips of 30–50 ms: the uncertainty is about half the smallest round
  // trip near the event (the δ/2 bound, RFC 5905 §8), never far above it.
  EXPECT_LT(Percentile(t.retimed_u_ms, 0.95), 25.0 + 1.0);
}

TEST(RetimeTest, FastAndSlowClocksAndALanLink) {
  for (double drift : {-150.0, 0.0, 450.0}) {
    for (const Link& link : {kSymmetric, kLan}) {
      Options o;
      o.link = link;
      o.drift_ppm = drift;
      o.length = Duration::Seconds(60);
      Tally t;
      Check(o, 5, &t);
      EXPECT_EQ(t.outside, 0) << "drift " << drift;
      EXPECT_LE(Percentile(t.retimed_error_ms, 0.95), Percentile(t.live_error_ms, 0.95) + 1e-3)
          << "drift " << drift;
    }
  }
}

TEST(RetimeTest, AsymmetricLinkStaysWithinTheAsymmetryBound) {
  Options o;
  o.link = kAsymmetric;
  Tally t;
  Check(o, 10, &t);
  EXPECT_EQ(t.outside, 0);
  // Every estimate from round trips is off by the unseen asymmetry, here
  // (d_f,min − d_b,min)/2 ≈ 9 ms (RFC 5905 §8): within 1.1× of (25 − 5)/2.
  EXPECT_LT(Percentile(t.retimed_error_ms, 0.95), 1.1 * 10.0);
  EXPECT_LE(Percentile(t.retimed_u_ms, 0.5), Percentile(t.live_u_ms, 0.5));
}

TEST(RetimeTest, ClockJumpsSplitTheClockIntoSegments) {
  for (Duration jump : {Duration::Seconds(2), -Duration::Seconds(3)}) {
    for (bool flags : {true, false}) {
      Options o;
      o.jump_at = Duration::Millis(60'300);
      o.jump = jump;
      o.pass_live_flags = flags;
      SimRun run = Simulate(o, 7);
      EXPECT_EQ(RetimeSegments(run.probes).size(), 2u) << jump.seconds() << " flags " << flags;
      Tally t;
      Check(o, 5, &t);
      EXPECT_EQ(t.outside, 0) << "jump " << jump.seconds() << " s, live flags " << flags;
      EXPECT_EQ(t.kept, 0);
    }
  }
}

TEST(RetimeTest, OneAbsurdProbeIsIgnoredNotASegment) {
  SimRun run = Simulate(Options{}, 3);
  ProbeTimestamps bad = run.probes[40].t;
  bad.t2 = bad.t2 + Duration::Seconds(3600);
  bad.t3 = bad.t3 + Duration::Seconds(3600);
  run.probes.insert(run.probes.begin() + 41, RetimeProbe{bad, false, false});
  for (RetimeEvent& e : run.events) {
    if (e.probes_before > 41) ++e.probes_before;
  }
  EXPECT_EQ(RetimeSegments(run.probes).size(), 1u);
  const std::vector<RetimedTime> out = RetimeClock(run.probes, run.events);
  for (size_t i = 0; i < out.size(); ++i) {
    EXPECT_LE(Abs(out[i].session - run.truth[i]), out[i].uncertainty) << i;
  }
}

TEST(RetimeTest, TooFewOrNoProbesKeepTheLiveTimes) {
  SimRun run = Simulate(Options{}, 1);
  std::vector<RetimeProbe> two(run.probes.begin(), run.probes.begin() + 2);
  std::vector<RetimeEvent> events(run.events.begin(), run.events.begin() + 5);
  for (RetimeEvent& e : events) e.probes_before = std::min<size_t>(e.probes_before, 2);
  for (const RetimedTime& t : RetimeClock(two, events)) {
    EXPECT_EQ(t.outcome, RetimeOutcome::kFewProbes);
  }
  const std::vector<RetimedTime> none = RetimeClock({}, events);
  ASSERT_EQ(none.size(), events.size());
  for (size_t i = 0; i < none.size(); ++i) {
    EXPECT_EQ(none[i].outcome, RetimeOutcome::kNoProbes);
    EXPECT_EQ(none[i].session, events[i].live);
    EXPECT_EQ(none[i].uncertainty, events[i].live_uncertainty);
    EXPECT_EQ(none[i].probes, 0);
  }
  EXPECT_STREQ(RetimeOutcomeName(RetimeOutcome::kFewProbes), "few_probes");
}

TEST(RetimeTest, ContradictoryProbesKeepTheLiveTimes) {
  // Every probe claims a round trip 4 ms shorter than the client's hold: no
  // pair of clocks with non-negative delays gives that (RFC 5905 §8 δ < 0).
  std::vector<RetimeProbe> probes;
  for (int k = 0; k < 20; ++k) {
    const SessionTime t1 = kOrigin + Duration::Seconds(k);
    const ClientTime t2 = ClientTime::FromNanos(t1.nanos()) + Duration::Millis(3200);
    probes.push_back({{t1, t2, t2 + Duration::Millis(5), t1 + Duration::Millis(1)}, false, false});
  }
  RetimeEvent e{ClientTime::FromNanos(kOpenUtcNs) + Duration::Millis(8200),
                kOrigin + Duration::Seconds(5), Duration::Millis(7), probes.size(), SessionTime()};
  const std::vector<RetimedTime> out = RetimeClock(probes, std::span<const RetimeEvent>(&e, 1));
  ASSERT_EQ(out.size(), 1u);
  EXPECT_EQ(out[0].outcome, RetimeOutcome::kInconsistent);
  EXPECT_EQ(out[0].session, e.live);
}

TEST(RetimeTest, TheSameClientReadingMapsToTheSameTime) {
  SimRun run = Simulate(Options{}, 5);
  std::vector<RetimeEvent> events = {run.events[50], run.events[50]};
  events[1].probes_before = events[0].probes_before + 3;  // recorded a little later
  const std::vector<RetimedTime> out = RetimeClock(run.probes, events);
  EXPECT_EQ(out[0].session, out[1].session);
  EXPECT_EQ(out[0].uncertainty, out[1].uncertainty);
}

TEST(RetimeTest, EventsBeforeTheFirstProbeWidenWithTheDriftBound) {
  SimRun run = Simulate(Options{}, 9);
  DeviceClock clock(Options{}.offset, Options{}.drift_ppm);
  const SessionTime truth = kOrigin - Duration::Seconds(20);  // sent long before connecting
  RetimeEvent e{clock.Read(truth), truth, Duration::Seconds(1), 0, SessionTime()};
  const std::vector<RetimedTime> out = RetimeClock(run.probes, std::span<const RetimeEvent>(&e, 1));
  ASSERT_EQ(out[0].outcome, RetimeOutcome::kRetimed);
  EXPECT_LE(Abs(out[0].session - truth), out[0].uncertainty);
  EXPECT_GT(out[0].uncertainty, Duration::Millis(15));  // more than the probes' own δ/2
}

TEST(RetimeTest, AbsurdReadingsGiveADefinedAnswer) {
  // Event times come from clients: any int64 must give a defined result
  // (kept, or retimed with an uncertainty that still holds), never a crash
  // or an overflow (run under the sanitizers by ./run test).
  SimRun run = Simulate(Options{}, 2);
  for (int64_t c : {std::numeric_limits<int64_t>::min(), std::numeric_limits<int64_t>::max(),
                    int64_t{0}, int64_t{-1}}) {
    RetimeEvent e{ClientTime::FromNanos(c), kOrigin, Duration::Seconds(1), run.probes.size(),
                  kOrigin + Duration::Seconds(200)};
    const std::vector<RetimedTime> out =
        RetimeClock(run.probes, std::span<const RetimeEvent>(&e, 1));
    ASSERT_EQ(out.size(), 1u);
    EXPECT_GE(out[0].uncertainty, Duration::Zero());
  }
}

TEST(RetimeTest, OptionsAreDescribedAsJson) {
  const std::string d = DescribeRetimeOptions(RetimeOptions{});
  EXPECT_EQ(d.front(), '{');
  EXPECT_EQ(d.back(), '}');
  EXPECT_NE(d.find("\"half_window_s\":30"), std::string::npos) << d;
  EXPECT_NE(d.find("\"wander_ppm_per_s\":0.05"), std::string::npos) << d;
}

}  // namespace
}  // namespace tickmark::retime_test

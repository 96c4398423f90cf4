// ProbeScheduler: the pace of a client's clock probes and its rate limits —
// fast while a model is young, boosted while it is loose, steady otherwise,
// never closer than the per-client cap, and extras only while a shared
// budget has tokens. Time is a Duration the test advances by hand.
#include "server/core/probe_scheduler.h"

#include <algorithm>
#include <cstdio>
#include <functional>
#include <vector>

#include "gtest/gtest.h"
#include "server/core/clock_model.h"
#include "server/core/time.h"

namespace tickmark {
namespace {

using Pace = ProbeScheduler::Pace;

// A model meeting the default targets, and ones falling short of them.
ClockEstimate Tight() {
  ClockEstimate e;
  e.samples = 100;
  e.drift_fitted = true;
  e.drift_error_ppm = 2;
  e.offset_scatter = Duration::Micros(50);
  return e;
}
ClockEstimate NoDriftYet() {
  ClockEstimate e = Tight();
  e.drift_fitted = false;
  e.drift_error_ppm = 100;
  return e;
}
ClockEstimate Scattered() {
  ClockEstimate e = Tight();
  e.offset_scatter = Duration::Millis(3);
  return e;
}

// Sends every probe as soon as it is due, for `length`, with the model
// `model(at)`, and returns the send times.
std::vector<Duration> SendAllDue(
    ProbeScheduler& s, Duration from, Duration length,
    const std::function<ClockEstimate(Duration)>& model,
    const std::function<bool()>& take_token = [] { return true; }) {
  std::vector<Duration> sent;
  Duration at = std::max(from, s.due());
  while (at < from + length) {
    if (s.Admit(at, take_token)) {
      sent.push_back(at);
      s.Sent(at, model(at));
    }
    at = s.due();
  }
  return sent;
}

int CountIn(const std::vector<Duration>& sent, Duration from, Duration to) {
  return static_cast<int>(
      std::count_if(sent.begin(), sent.end(), [&](Duration t) { return t >= from && t < to; }));
}

TEST(ProbeSchedulerTest, FastForTheFirstTenSecondsThenSteadyWhenTight) {
  ProbeScheduler s;
  s.Restart(Duration::Zero());
  EXPECT_EQ(s.due(), Duration::Zero());  // the first probe right away
  const std::vector<Duration> sent =
      SendAllDue(s, Duration::Zero(), Duration::Seconds(30), [](Duration) { return Tight(); });
  // 20 probes/s for the first 10 s (50 ms apart), then one a second.
  EXPECT_EQ(CountIn(sent, Duration::Zero(), Duration::Seconds(10)), 200);
  EXPECT_EQ(CountIn(sent, Duration::Seconds(11), Duration::Seconds(30)), 19);
  EXPECT_EQ(s.pace(), Pace::kSteady);
}

TEST(ProbeSchedulerTest, BoostedWhileTheModelIsLoose) {
  for (const ClockEstimate& loose : {NoDriftYet(), Scattered(), ClockEstimate{}}) {
    ProbeScheduler s;
    s.Restart(Duration::Zero());
    EXPECT_TRUE(s.Loose(loose));
    const std::vector<Duration> sent =
        SendAllDue(s, Duration::Zero(), Duration::Seconds(20), [&](Duration) { return loose; });
    // 10 probes/s (the boost) after the fast 10 s.
    EXPECT_EQ(CountIn(sent, Duration::Seconds(11), Duration::Seconds(20)), 90);
    EXPECT_EQ(s.pace(), Pace::kBoost);
  }
  EXPECT_FALSE(ProbeScheduler().Loose(Tight()));
}

TEST(ProbeSchedulerTest, NoBoostBeyondItsWindowEvenWhenLoose) {
  ProbeScheduler s;  // boost_within 120 s
  s.Restart(Duration::Zero());
  const std::vector<Duration> sent =
      SendAllDue(s, Duration::Zero(), Duration::Seconds(150), [](Duration) { return Scattered(); });
  EXPECT_EQ(CountIn(sent, Duration::Seconds(100), Duration::Seconds(110)), 100);
  EXPECT_EQ(CountIn(sent, Duration::Seconds(121), Duration::Seconds(150)), 29);
  EXPECT_EQ(s.pace(), Pace::kSteady);
}

TEST(ProbeSchedulerTest, BackToSteadyOnceTheTargetsAreMet) {
  ProbeScheduler s;
  s.Restart(Duration::Zero());
  const std::vector<Duration> sent =
      SendAllDue(s, Duration::Zero(), Duration::Seconds(40),
                 [](Duration at) { return at < Duration::Seconds(20) ? Scattered() : Tight(); });
  EXPECT_EQ(CountIn(sent, Duration::Seconds(11), Duration::Seconds(19)), 80);
  EXPECT_EQ(CountIn(sent, Duration::Seconds(21), Duration::Seconds(40)), 19);
}

TEST(ProbeSchedulerTest, NeverCloserThanThePerClientCap) {
  ProbeScheduler::Options o;
  o.fast_interval = Duration::Millis(1);  // asks for 1000/s
  o.boost_interval = Duration::Millis(2);
  o.min_interval = Duration::Millis(40);  // the cap: 25/s
  ProbeScheduler s(o);
  s.Restart(Duration::Zero());
  const std::vector<Duration> sent =
      SendAllDue(s, Duration::Zero(), Duration::Seconds(20), [](Duration) { return Scattered(); });
  for (size_t i = 1; i < sent.size(); ++i) {
    ASSERT_GE(sent[i] - sent[i - 1], Duration::Millis(40)) << "probe " << i;
  }
  // A restart right after a probe waits for the cap too.
  s.Restart(sent.back() + Duration::Millis(1));
  EXPECT_EQ(s.due(), sent.back() + Duration::Millis(40));
}

TEST(ProbeSchedulerTest, ARestartProbesFastAgain) {
  ProbeScheduler s;
  s.Restart(Duration::Zero());
  SendAllDue(s, Duration::Zero(), Duration::Seconds(30), [](Duration) { return Tight(); });
  const Duration jump = Duration::Seconds(30) + Duration::Millis(300);
  s.Restart(jump);  // the client's clock stepped; the model restarted
  EXPECT_EQ(s.due(), jump);
  const std::vector<Duration> sent =
      SendAllDue(s, jump, Duration::Seconds(10), [](Duration) { return Tight(); });
  EXPECT_EQ(static_cast<int>(sent.size()), 200);
}

TEST(ProbeSchedulerTest, FixedScheduleIsABurstThenSteady) {
  ProbeScheduler::Options o;
  o.adaptive = false;
  ProbeScheduler s(o);
  s.Restart(Duration::Zero());
  const std::vector<Duration> sent =
      SendAllDue(s, Duration::Zero(), Duration::Seconds(10), [](Duration) { return Scattered(); });
  // 8 burst probes, each followed by 50 ms, then one a second: the server's
  // schedule before adaptive probing.
  ASSERT_GE(sent.size(), 10u);
  EXPECT_EQ(sent[8], Duration::Millis(400));
  EXPECT_EQ(sent[9], Duration::Millis(1400));
  EXPECT_EQ(static_cast<int>(sent.size()), 9 + 9);
}

// A budget shared by many streams (a token bucket of `rate` per second and
// `burst` saved up, driven by the test's clock).
class SharedBudget {
 public:
  SharedBudget(double rate, double burst) : rate_(rate), burst_(burst), tokens_(burst) {}
  void AdvanceTo(Duration now) {
    tokens_ = std::min(burst_, tokens_ + rate_ * (now - last_).seconds());
    last_ = now;
  }
  bool TryTake() {
    if (tokens_ < 1) return false;
    tokens_ -= 1;
    return true;
  }

 private:
  double rate_, burst_, tokens_;
  Duration last_;
};

// 50 streams start together, each wanting 20 probes/s, against a budget of
// 200 probes/s: extras go only while tokens last, every stream is probed at
// least every max_interval (5 s), and the total stays within the budget plus
// the streams' steady rate.
TEST(ProbeSchedulerTest, AServerWideBudgetBoundsTheTotal) {
  constexpr int kStreams = 50;
  SharedBudget budget(200, 200);
  std::vector<ProbeScheduler> streams(kStreams);
  for (ProbeScheduler& s : streams) s.Restart(Duration::Zero());
  std::vector<int> per_second(20, 0);
  std::vector<Duration> last(kStreams, -Duration::Seconds(10));
  for (Duration now = Duration::Zero(); now < Duration::Seconds(20); now += Duration::Millis(1)) {
    budget.AdvanceTo(now);
    for (int i = 0; i < kStreams; ++i) {
      ProbeScheduler& s = streams[static_cast<size_t>(i)];
      if (now < s.due()) continue;
      if (!s.Admit(now, [&] { return budget.TryTake(); })) continue;
      s.Sent(now, Scattered());
      // Per stream, never closer than the cap, never further than max_interval.
      EXPECT_GE(now - last[static_cast<size_t>(i)], Duration::Millis(50));
      EXPECT_LE(now - last[static_cast<size_t>(i)], Duration::Seconds(10));
      if (last[static_cast<size_t>(i)] >= Duration::Zero()) {
        EXPECT_LE(now - last[static_cast<size_t>(i)], Duration::Seconds(5));
      }
      last[static_cast<size_t>(i)] = now;
      ++per_second[static_cast<size_t>(now.nanos() / 1'000'000'000)];
    }
  }
  for (size_t second = 1; second < per_second.size(); ++second) {
    // 200 from the budget + at most one steady probe per stream.
    EXPECT_LE(per_second[second], 200 + kStreams) << "second " << second;
    EXPECT_GE(per_second[second], kStreams / 5) << "second " << second;  // max_interval holds
  }
  // The first second may spend the saved-up burst as well.
  EXPECT_LE(per_second[0], 200 + 200 + kStreams);
}

TEST(ProbeSchedulerTest, ARefusedExtraWaitsForTheSteadySlot) {
  ProbeScheduler s;
  s.Restart(Duration::Zero());
  ASSERT_TRUE(s.Admit(Duration::Zero(), [] { return false; }));  // the first is not an extra
  s.Sent(Duration::Zero(), ClockEstimate{});
  EXPECT_EQ(s.due(), Duration::Millis(50));
  int asked = 0;
  EXPECT_FALSE(s.Admit(Duration::Millis(50), [&] { return ++asked, false; }));
  EXPECT_EQ(asked, 1);
  EXPECT_EQ(s.due(), Duration::Seconds(1));
  EXPECT_EQ(s.pace(), Pace::kSteady);
  // At the steady slot it asks again; refused, it waits a steady interval
  // more, but goes once max_interval (5 s) has passed since the last probe.
  EXPECT_FALSE(s.Admit(Duration::Seconds(1), [&] { return ++asked, false; }));
  EXPECT_EQ(s.due(), Duration::Seconds(2));
  EXPECT_FALSE(s.Admit(Duration::Millis(4500), [&] { return ++asked, false; }));
  EXPECT_EQ(s.due(), Duration::Seconds(5));
  EXPECT_TRUE(s.Admit(Duration::Seconds(5), [&] { return ++asked, false; }));
  EXPECT_EQ(asked, 4);
}

// 2000 settled clients against a budget of 500 probes/s (the default): the
// steady rate would be 2000 probes/s; each client is probed less often, never
// less than once per max_interval, and the total comes down to the budget
// plus what max_interval forces (2000 / 5 s = 400/s).
TEST(ProbeSchedulerTest, MoreClientsThanTheBudgetCoversAreProbedLessOften) {
  constexpr int kStreams = 2000;
  SharedBudget budget(500, 500);
  ProbeScheduler::Options o;
  o.adaptive = false;
  o.burst = 0;  // settled from the start: steady probes only
  std::vector<ProbeScheduler> streams(kStreams, ProbeScheduler(o));
  for (int i = 0; i < kStreams; ++i) {  // spread over the first second
    streams[static_cast<size_t>(i)].Restart(Duration::Micros(500 * i));
  }
  std::vector<Duration> last(kStreams, -Duration::Seconds(100));
  Duration longest;
  int total = 0;
  const Duration end = Duration::Seconds(30);
  for (Duration now = Duration::Zero(); now < end; now += Duration::Millis(5)) {
    budget.AdvanceTo(now);
    for (int i = 0; i < kStreams; ++i) {
      ProbeScheduler& s = streams[static_cast<size_t>(i)];
      if (now < s.due()) continue;
      if (!s.Admit(now, [&] { return budget.TryTake(); })) continue;
      s.Sent(now, ClockEstimate{});
      if (last[static_cast<size_t>(i)] >= Duration::Zero()) {
        longest = std::max(longest, now - last[static_cast<size_t>(i)]);
      }
      last[static_cast<size_t>(i)] = now;
      if (now >= Duration::Seconds(10)) ++total;
    }
  }
  // Per client: at least every 5 s (to the simulation's 5 ms step).
  EXPECT_LE(longest, Duration::Seconds(5) + Duration::Millis(5));
  // Over the last 20 s: at most the budget plus the forced probes, far below
  // the 2000/s the steady rate alone would make.
  const double per_second = total / 20.0;
  EXPECT_LE(per_second, 500 + kStreams / 5.0 + 50);
  EXPECT_GE(per_second, kStreams / 5.0);
  std::printf("2000 clients, budget 500/s: %.0f probes/s, longest gap %.2f s\n", per_second,
              longest.seconds());
}

TEST(ProbeSchedulerTest, PaceNames) {
  EXPECT_STREQ(ProbePaceName(Pace::kBurst), "burst");
  EXPECT_STREQ(ProbePaceName(Pace::kFast), "fast");
  EXPECT_STREQ(ProbePaceName(Pace::kBoost), "boost");
  EXPECT_STREQ(ProbePaceName(Pace::kSteady), "steady");
}

}  // namespace
}  // namespace tickmark

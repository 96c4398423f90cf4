// Disciplined clocks: the decision table of ChooseTimeSource (synchronised
// or not on each side × bounds × the round-trip model's uncertainty), the
// real-time bound's terms, the server's cached state, and the kernel reader
// against the kernel's other interface.
#include "server/core/disciplined_clock.h"

#include <sys/timex.h>

#include <cstdint>
#include <limits>
#include <string>
#include <vector>

#include "gtest/gtest.h"

namespace tickmark {
namespace {

constexpr Duration kMs = Duration::Millis(1);
constexpr Duration kUs = Duration::Micros(1);

DisciplineState Synced(Duration max_error) {
  FakeDiscipline f;
  f.SetSynced(max_error);
  return f.Read();
}

DisciplineState Unsynced() {
  FakeDiscipline f;
  f.SetUnsynced();
  return f.Read();
}

// A feedback 10 ms old, the server's state just read, both clocks synced
// with 1 ms bounds, a round-trip model 12.5 ms wide (a 25 ms δ_min): real time.
TimeSourceInputs Baseline() {
  TimeSourceInputs in;
  in.server = Synced(kMs);
  in.server_state_age = Duration::Zero();
  in.client = {1'700'000'000'000'000'000, kMs, true};
  in.event_age = kMs * 10;
  in.read_spread = Duration::Zero();
  in.round_trip_uncertainty = Duration::Micros(12'500);
  in.disagreement = kMs * 5;
  return in;
}

TEST(RealtimeBoundTest, SumsBothBoundsTheSpreadAndA500PpmGrowthOverTheAges) {
  // 1 ms + 2 ms + 3 µs + 500 ppm × (0.4 s + 2 × 0.05 s) = 3.003 ms + 250 µs.
  // (500 ppm: adjtimex(2), ADJ_FREQUENCY clamped to ±500 ppm.)
  EXPECT_EQ(RealtimeBound(kMs, kMs * 2, Duration::Millis(400), Duration::Millis(50), kUs * 3),
            Duration::Micros(3'253));
  // No ages, no spread: the two bounds alone.
  EXPECT_EQ(RealtimeBound(kMs, kMs, Duration::Zero(), Duration::Zero(), Duration::Zero()), kMs * 2);
  // Rounded up, never down: 500 ppm of 1 ns is 1 ns here.
  EXPECT_EQ(RealtimeBound(Duration::Zero(), Duration::Zero(), Duration::Nanos(1), Duration::Zero(),
                          Duration::Zero()),
            Duration::Nanos(1));
  // Absurd ages saturate rather than wrap.
  EXPECT_GT(RealtimeBound(kMs, kMs, Duration::Max(), Duration::Max(), Duration::Max()),
            Duration::Seconds(1'000'000));
}

TEST(ChooseTimeSourceTest, BaselineUsesRealTimeWithItsOwnBound) {
  const TimeSourceDecision d = ChooseTimeSource(Baseline());
  EXPECT_EQ(d.source, TimeSourceChoice::kRealtime);
  EXPECT_EQ(d.reason, TimeSourceReason::kRealtime);
  // 1 ms + 1 ms + 500 ppm × 2 × 10 ms = 2.01 ms.
  EXPECT_EQ(d.realtime_bound, Duration::Micros(2'010));
  EXPECT_EQ(d.uncertainty, d.realtime_bound);
  EXPECT_STREQ(TimeSourceReasonName(d.reason), "realtime");
}

// The whole table: each row changes the baseline in one way.
TEST(ChooseTimeSourceTest, DecisionTable) {
  struct Row {
    std::string what;
    void (*change)(TimeSourceInputs*);
    TimeSourceChoice source;
    TimeSourceReason reason;
  };
  const std::vector<Row> rows = {
      {"both synced, 2 ms against 12.5 ms", [](TimeSourceInputs*) {}, TimeSourceChoice::kRealtime,
       TimeSourceReason::kRealtime},
      {"mapping turned off", [](TimeSourceInputs* in) { in->enabled = false; },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kDisabled},
      {"no reading", [](TimeSourceInputs* in) { in->client.realtime_ns = 0; },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kNoReading},
      {"negative reading", [](TimeSourceInputs* in) { in->client.realtime_ns = -5; },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kNoReading},
      {"client unsynced", [](TimeSourceInputs* in) { in->client.synced = false; },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kClientUnsynced},
      {"client synced, bound missing",
       [](TimeSourceInputs* in) { in->client.bound = Duration::Zero(); },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kClientBound},
      {"client synced, negative bound", [](TimeSourceInputs* in) { in->client.bound = -kMs; },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kClientBound},
      // adjtimex(2)/ntp_gettime(3): maxerror is clamped at 16 s, where the
      // kernel declares the clock unsynchronised: no bound.
      {"client bound at the kernel's 16 s clamp",
       [](TimeSourceInputs* in) { in->client.bound = Duration::Seconds(16); },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kClientBound},
      {"server unsynced", [](TimeSourceInputs* in) { in->server = Unsynced(); },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kServerUnsynced},
      {"server says synced with a zero bound",
       [](TimeSourceInputs* in) { in->server.max_error = Duration::Zero(); },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kServerBound},
      {"server says synced at the 16 s clamp",
       [](TimeSourceInputs* in) { in->server.max_error = Duration::Seconds(16); },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kServerBound},
      {"both unsynced",
       [](TimeSourceInputs* in) {
         in->client.synced = false;
         in->server = Unsynced();
       },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kClientUnsynced},
      {"bounds too wide: 2 × 7 ms against 12.5 ms",
       [](TimeSourceInputs* in) {
         in->client.bound = kMs * 7;
         in->server = Synced(kMs * 7);
       },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kNotTighter},
      {"a tight LAN round trip: 2 ms against 0.3 ms",
       [](TimeSourceInputs* in) { in->round_trip_uncertainty = Duration::Micros(300); },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kNotTighter},
      {"equal is not better",
       [](TimeSourceInputs* in) { in->round_trip_uncertainty = Duration::Micros(2'010); },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kNotTighter},
      {"one nanosecond better is better",
       [](TimeSourceInputs* in) {
         in->round_trip_uncertainty = Duration::Micros(2'010) + Duration::Nanos(1);
         in->disagreement = Duration::Zero();
       },
       TimeSourceChoice::kRealtime, TimeSourceReason::kRealtime},
      {"an old server state grows the bound past the round trip",
       [](TimeSourceInputs* in) {
         in->round_trip_uncertainty = Duration::Micros(2'500);
         in->server_state_age = Duration::Seconds(1);  // + 500 µs
       },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kNotTighter},
      {"the two routes disagree beyond both bounds",
       [](TimeSourceInputs* in) { in->disagreement = Duration::Micros(14'511); },
       TimeSourceChoice::kRoundTrip, TimeSourceReason::kDisagrees},
      {"... and just within them",
       [](TimeSourceInputs* in) { in->disagreement = -Duration::Micros(14'510); },
       TimeSourceChoice::kRealtime, TimeSourceReason::kRealtime},
      {"the reading could not be mapped",
       [](TimeSourceInputs* in) { in->disagreement = std::nullopt; }, TimeSourceChoice::kRoundTrip,
       TimeSourceReason::kOutOfRange},
  };
  for (const Row& row : rows) {
    SCOPED_TRACE(row.what);
    TimeSourceInputs in = Baseline();
    row.change(&in);
    const TimeSourceDecision d = ChooseTimeSource(in);
    EXPECT_EQ(d.source, row.source);
    EXPECT_EQ(d.reason, row.reason) << TimeSourceReasonName(d.reason);
    if (d.source == TimeSourceChoice::kRoundTrip) {
      EXPECT_EQ(d.uncertainty, in.round_trip_uncertainty);
    } else {
      EXPECT_EQ(d.uncertainty, d.realtime_bound);
      EXPECT_LT(d.uncertainty, in.round_trip_uncertainty);
    }
  }
}

TEST(ChooseTimeSourceTest, NeverRealTimeWhenEitherSideIsUnsynchronisedWhateverTheBounds) {
  for (const bool client_synced : {false, true}) {
    for (const bool server_synced : {false, true}) {
      for (const Duration bound : {kUs, kMs, Duration::Seconds(15)}) {
        for (const Duration rt : {kUs, Duration::Seconds(1), Duration::Max()}) {
          TimeSourceInputs in = Baseline();
          in.client.synced = client_synced;
          in.client.bound = bound;
          in.server = server_synced ? Synced(bound) : Unsynced();
          // A kernel's unsynced state may still carry a small maxerror.
          if (!server_synced) in.server.max_error = bound;
          in.round_trip_uncertainty = rt;
          in.disagreement = Duration::Zero();
          const TimeSourceDecision d = ChooseTimeSource(in);
          if (!client_synced || !server_synced) {
            EXPECT_EQ(d.source, TimeSourceChoice::kRoundTrip)
                << client_synced << server_synced << bound.nanos() << " " << rt.nanos();
          }
        }
      }
    }
  }
}

TEST(RealtimeToSessionTest, MapsThroughThePairAndRefusesWhatDoesNotFit) {
  const SessionTime anchor = SessionTime::FromNanos(1'700'000'000'000'000'000);
  // A real-time reading 3 ms before the server's own real-time reading lies
  // 3 ms before the session time read with it.
  EXPECT_EQ(
      RealtimeToSession(1'700'000'050'000'000'000 - 3'000'000, anchor, 1'700'000'050'000'000'000),
      anchor - kMs * 3);
  EXPECT_FALSE(RealtimeToSession(std::numeric_limits<int64_t>::max(), anchor, -1).has_value());
  EXPECT_FALSE(RealtimeToSession(1, SessionTime::FromNanos(std::numeric_limits<int64_t>::max()), 0)
                   .has_value());
}

TEST(ReadRealtimeAtTest, BackdatesTheRealTimeReadingToTheEvent) {
  FakeMonotonic mono(50'000'000'000);  // the client's event clock
  FakeMonotonic realtime(1'700'000'000'000'000'000);
  FakeDiscipline d(&realtime);
  // Unsynchronised: nothing to send.
  d.SetUnsynced();
  EXPECT_FALSE(ReadRealtimeAt(49'000'000'000, mono, d).has_value());
  d.SetSynced(Duration::Micros(800));
  // An event 1 s before now on the event clock was 1 s before now in real
  // time; the clocks stand still here, so there is no spread to add.
  const auto r = ReadRealtimeAt(49'000'000'000, mono, d);
  ASSERT_TRUE(r.has_value());
  EXPECT_EQ(r->realtime_ns, 1'700'000'000'000'000'000 - 1'000'000'000);
  EXPECT_EQ(r->bound, Duration::Micros(800));
  EXPECT_TRUE(r->synced);
  // No event time, or one that backdates before the epoch: nothing.
  EXPECT_FALSE(ReadRealtimeAt(0, mono, d).has_value());
  EXPECT_FALSE(ReadRealtimeAt(std::numeric_limits<int64_t>::min(), mono, d).has_value());
  // A bound the kernel would clamp: nothing.
  d.SetSynced(Duration::Seconds(16));
  EXPECT_FALSE(ReadRealtimeAt(49'000'000'000, mono, d).has_value());
}

TEST(DisciplineCacheTest, ReadsTheKernelAtMostOncePerRefresh) {
  FakeMonotonic clock;
  FakeDiscipline source;
  source.SetSynced(kMs);
  DisciplineCache cache(&source, &clock, Duration::Seconds(1));
  EXPECT_EQ(cache.Get().age, Duration::Zero());
  EXPECT_EQ(source.reads(), 1);
  clock.Advance(Duration::Millis(999));
  source.SetUnsynced();  // not seen until the refresh
  const DisciplineCache::Snapshot s = cache.Get();
  EXPECT_TRUE(s.state.synced);
  EXPECT_EQ(s.age, Duration::Millis(999));
  EXPECT_EQ(source.reads(), 1);
  clock.Advance(Duration::Millis(1));
  EXPECT_FALSE(cache.Get().state.synced);
  EXPECT_EQ(source.reads(), 2);
  EXPECT_EQ(cache.Get().age, Duration::Zero());
}

TEST(FakeDisciplineTest, UnsyncedLooksLikeAKernelWithoutADaemon) {
  FakeDiscipline f;
  EXPECT_FALSE(f.Read().synced);  // starts unsynchronised
  f.SetUnsynced();
  const DisciplineState s = f.Read();
  EXPECT_FALSE(s.synced);
  // adjtimex(2): TIME_ERROR and STA_UNSYNC; maxerror at the 16 s clamp.
  EXPECT_EQ(s.clock_state, TIME_ERROR);
  EXPECT_NE(s.status & STA_UNSYNC, 0);
  EXPECT_EQ(s.max_error, Duration::Seconds(16));
  FakeMonotonic rt(5'000);
  FakeDiscipline g(&rt);
  g.SetRealtimeOffset(Duration::Nanos(-1'000));
  EXPECT_EQ(g.RealtimeNanos(), 4'000);
}

// KernelDiscipline against the kernel's other interface, ntp_gettimex
// (glibc, ntp_gettime(3)): same sync verdict, same bound up to the kernel's
// own growth between the two calls (500 µs per second boundary crossed).
TEST(KernelDisciplineTest, AgreesWithNtpGettimex) {
  const DisciplineState s = KernelDiscipline::Get()->Read();
  ntptimeval ntv{};
  const int r = ntp_gettimex(&ntv);
  // A sandbox may refuse even the read (seccomp); then KernelDiscipline
  // must say unsynchronised, the safe fallback.
  if (s.clock_state == -1 || r == -1) {
    EXPECT_FALSE(s.synced);
    GTEST_SKIP() << "ntp_adjtime/ntp_gettimex refused here";
  }
  if (r == TIME_ERROR || (s.status & STA_UNSYNC) != 0) {
    EXPECT_FALSE(s.synced);
  }
  const int64_t ours_us = s.max_error.nanos() / 1000;
  EXPECT_LE(ours_us, ntv.maxerror);
  EXPECT_LE(ntv.maxerror - ours_us, 1'000) << "more than two second boundaries apart";
  EXPECT_EQ(s.synced, r != TIME_ERROR && (s.status & STA_UNSYNC) == 0 &&
                          ntv.maxerror < 16'000'000 && ntv.maxerror > 0);
  // CLOCK_REALTIME is the Unix epoch clock: after 2020-01-01 (1577836800 s;
  // a fact of the trade, no source needed beyond date(1)).
  EXPECT_GT(KernelDiscipline::Get()->RealtimeNanos(), int64_t{1'577'836'800} * 1'000'000'000);
}

}  // namespace
}  // namespace tickmark

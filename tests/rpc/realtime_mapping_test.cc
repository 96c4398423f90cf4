// Disciplined clocks in the ingest reactor (docs/time-model.md,
// "Disciplined clocks"), on raw streams against an in-process server whose
// kernel is a FakeDiscipline (LiveService::Options::discipline) reading this
// machine's CLOCK_REALTIME, so the readings the test sends are true:
//  - before any probe is back the round trip has only the hello's crude
//    mapping (1 s): a true real-time reading beats it;
//  - a "synchronised" reading that puts the event after its arrival beyond
//    its bound had a false bound: the round trip's mapping is stored
//    instead (reason "implausible"), nothing is refused;
//  - a round-trip step after a real-time one starts exactly where that one
//    ended, with the move added to its uncertainty.
#include <time.h>

#include <string>

#include "server/core/disciplined_clock.h"
#include "tests/rpc/test_server.h"

namespace tickmark::testing {
namespace {

constexpr int64_t kBoundNs = 1'000'000;  // both kernels' maxerror: 1 ms

int64_t RealtimeNowNs() {
  timespec ts{};
  clock_gettime(CLOCK_REALTIME, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 + ts.tv_nsec;
}

rpc::LiveService::Options Options(const ClockDiscipline* kernel) {
  rpc::LiveService::Options o = TestLiveOptions();
  o.discipline = kernel;
  // Messages are mapped at once, before any probe is back (the hello's
  // mapping), instead of waiting for one.
  o.clock_wait = Duration::Zero();
  return o;
}


// A feedback whose event was 5 ms ago, with a real-time reading `skew_ns`
// off the truth claiming a 1 ms bound.
v1::TrainerMessage FeedbackWithReading(uint64_t seq, int64_t now_ns, int64_t skew_ns) {
  v1::TrainerMessage m = Feedback(seq, 1.0, now_ns - 5'000'000);
  m.mutable_feedback()->set_event_realtime_ns(RealtimeNowNs() - 5'000'000 + skew_ns);
  m.mutable_feedback()->set_realtime_bound_ns(kBoundNs);
  m.mutable_feedback()->set_realtime_synced(true);
  return m;
}

TEST(RealtimeMappingTest, BeforeTheFirstProbeATrueReadingBeatsTheHelloMapping) {
  FakeDiscipline kernel;
  kernel.SetSynced(Duration::Nanos(kBoundNs));
  TempDir dir;
  TestServer server(dir.path(), Options(&kernel));
  const auto [session, admin] = server.CreateSession();
  auto t = OpenTrainer(server);
  ASSERT_TRUE(t->SendHello(server.IssueToken(session, v1::ROLE_TRAINER, "p07", admin), "pad-1"));
  ASSERT_TRUE(t->Welcome());
  ASSERT_TRUE(t->Write(FeedbackWithReading(1, t->Now(), 0)));
  auto ack = t->NextAck();
  ASSERT_TRUE(ack);
  EXPECT_EQ(ack->code(), 0) << ack->message();
  // 1 ms + 1 ms + 500 ppm growth over milliseconds, far below the hello
  // mapping's 1 s.
  EXPECT_LT(ack->uncertainty_ns(), 3 * kBoundNs);
  EXPECT_TRUE(t->Close().ok());
  const auto fb = server.Records(session, admin, v1::RECORD_KIND_FEEDBACK);
  ASSERT_EQ(fb.size(), 1u);
  EXPECT_EQ(fb[0].feedback().time_source(), v1::TIME_SOURCE_REALTIME);
  EXPECT_EQ(fb[0].feedback().time_source_reason(), "realtime");
  EXPECT_EQ(fb[0].feedback().round_trip_uncertainty_ns(), Duration::Seconds(1).nanos());
  EXPECT_EQ(fb[0].feedback().server_realtime_bound_ns(), kBoundNs);
  EXPECT_FALSE(fb[0].feedback().event_clamped());
  server.Shutdown();
}

TEST(RealtimeMappingTest, AReadingThatPutsTheEventAfterItsArrivalFallsBackToTheRoundTrip) {
  FakeDiscipline kernel;
  kernel.SetSynced(Duration::Nanos(kBoundNs));
  TempDir dir;
  TestServer server(dir.path(), Options(&kernel));
  const auto [session, admin] = server.CreateSession();
  auto t = OpenTrainer(server);
  ASSERT_TRUE(t->SendHello(server.IssueToken(session, v1::ROLE_TRAINER, "p07", admin), "pad-1"));
  ASSERT_TRUE(t->Welcome());
  // 400 ms ahead: within the hello mapping's 1 s of the round trip (so the
  // routes "agree"), but a person cannot act after the server got the act.
  ASSERT_TRUE(t->Write(FeedbackWithReading(1, t->Now(), 400'000'000)));
  auto ack = t->NextAck();
  ASSERT_TRUE(ack);
  EXPECT_EQ(ack->code(), 0) << ack->message();  // stored, not refused
  EXPECT_EQ(ack->uncertainty_ns(), Duration::Seconds(1).nanos());
  EXPECT_TRUE(t->Close().ok());
  const auto fb = server.Records(session, admin, v1::RECORD_KIND_FEEDBACK);
  ASSERT_EQ(fb.size(), 1u);
  EXPECT_EQ(fb[0].feedback().time_source(), v1::TIME_SOURCE_ROUND_TRIP);
  EXPECT_EQ(fb[0].feedback().time_source_reason(), "implausible");
  EXPECT_GT(fb[0].feedback().event_realtime_ns(), 0);  // what the client said, kept
  server.Shutdown();
}

TEST(RealtimeMappingTest, ARoundTripStepAfterARealTimeStepStartsWhereItEnded) {
  FakeDiscipline kernel;
  kernel.SetSynced(Duration::Nanos(kBoundNs));
  TempDir dir;
  TestServer server(dir.path(), Options(&kernel));
  const auto [session, admin] = server.CreateSession();
  auto a = OpenAgent(server);
  ASSERT_TRUE(a->SendHello(server.IssueToken(session, v1::ROLE_AGENT, "rover", admin), "rover-1"));
  ASSERT_TRUE(a->Welcome());
  const int64_t now = a->Now();
  const int64_t start1 = now - 30'000'000;
  const int64_t end1 = now - 20'000'000;
  v1::AgentMessage s1 = StepMsg(1, 1, start1, end1, "north");  // dock rover actions (§8)
  s1.mutable_step()->set_start_realtime_ns(RealtimeNowNs() - (a->Now() - start1));
  s1.mutable_step()->set_realtime_bound_ns(kBoundNs);
  s1.mutable_step()->set_realtime_synced(true);
  ASSERT_TRUE(a->Write(s1));
  ASSERT_TRUE(a->Write(StepMsg(2, 2, end1, now - 10'000'000, "east")));  // no reading
  for (int i = 0; i < 2; ++i) {
    auto ack = a->NextAck();
    ASSERT_TRUE(ack);
    EXPECT_EQ(ack->code(), 0) << ack->message();
  }
  EXPECT_TRUE(a->Close().ok());
  const auto steps = server.Records(session, admin, v1::RECORD_KIND_STEP);
  ASSERT_EQ(steps.size(), 2u);
  const v1::Step& first = steps[0].step();
  const v1::Step& second = steps[1].step();
  EXPECT_EQ(first.time_source(), v1::TIME_SOURCE_REALTIME);
  // The agent's clock and CLOCK_REALTIME tick together: the end is start
  // plus the length, exactly.
  EXPECT_EQ(first.end_session_ns() - first.start_session_ns(), end1 - start1);
  EXPECT_EQ(second.time_source(), v1::TIME_SOURCE_ROUND_TRIP);
  EXPECT_EQ(second.start_session_ns(), first.end_session_ns());
  EXPECT_EQ(second.end_session_ns() - second.start_session_ns(),
            (now - 10'000'000) - end1);  // moved whole
  EXPECT_GE(second.uncertainty_ns(), second.round_trip_uncertainty_ns());
  if (second.uncertainty_ns() > second.round_trip_uncertainty_ns()) {
    EXPECT_NE(second.time_source_reason().find("moved"), std::string::npos)
        << second.time_source_reason();
  }
  server.Shutdown();
}

}  // namespace
}  // namespace tickmark::testing

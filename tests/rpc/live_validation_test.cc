// The pure checks of server/rpc/validation.h and the token bucket, table
// driven; no server, no clock but a hand-driven one.
#include <gtest/gtest.h>

#include <limits>

#include "server/rpc/stream_admission.h"
#include "server/rpc/token_bucket.h"
#include "server/rpc/validation.h"

namespace tickmark::rpc {
namespace {

namespace v1 = tickmark::v1;
constexpr int64_t kMin = std::numeric_limits<int64_t>::min();
constexpr int64_t kMax = std::numeric_limits<int64_t>::max();

TEST(ValidationTest, ProbeTimesThatWouldOverflowAreRejectedWithAReason) {
  const SessionTime t1 = SessionTime::FromNanos(1'700'000'000'000'000'000);
  const SessionTime t4 = t1 + Duration::Millis(2);
  struct Case {
    int64_t t2, t3;
    bool ok;
  };
  const Case cases[] = {
      {1'000'000, 1'000'100, true},
      {kMin, kMax, false},  // issue 9.5: T3 − T2 wraps
      {kMax, kMax, false},  // T2 − T1 fine, T3 − T4 fine, their sum wraps
      {kMin, kMin, false},  // T2 − T1 wraps
      {5, 4, true},         // reversed, but the clock model judges order
  };
  for (const Case& c : cases) {
    absl::Status s = ValidateProbeTimes(t1, c.t2, c.t3, t4);
    EXPECT_EQ(s.ok(), c.ok) << c.t2 << " " << c.t3 << ": " << s.message();
    if (!s.ok()) {
      EXPECT_EQ(s.message(), "rejected_out_of_range");
    }
  }
}

TEST(ValidationTest, HelloOffsetMappingThatWouldOverflowIsOutOfRange) {
  EXPECT_FALSE(MapThroughHelloOffset(kMax, Duration::Nanos(-5)).ok());
  auto ok = MapThroughHelloOffset(1000, Duration::Nanos(400));
  ASSERT_TRUE(ok.ok());
  EXPECT_EQ(ok->nanos(), 600);
}

TEST(ValidationTest, EventTimeAfterArrivalBeyondItsUncertaintyIsRefusedOrClamped) {
  const Limits limits;
  const SessionTime arrival = SessionTime::FromNanos(1'000'000'000'000);
  const Duration u = Duration::Millis(3);
  // Issue 9.6: 4.5 s ahead with 3 ms uncertainty and a probed model.
  auto refused =
      JudgeEventTime(arrival + Duration::Millis(4500), u, arrival, true, Duration::Zero(), limits);
  EXPECT_EQ(refused.status.code(), absl::StatusCode::kOutOfRange);
  // Within the uncertainty: kept as mapped.
  auto within =
      JudgeEventTime(arrival + Duration::Millis(2), u, arrival, true, Duration::Zero(), limits);
  EXPECT_TRUE(within.status.ok());
  EXPECT_FALSE(within.clamped);
  EXPECT_EQ(within.event, arrival + Duration::Millis(2));
  // New model (hello mapping): clamped to arrival, uncertainty covers the shift.
  auto clamped = JudgeEventTime(arrival + Duration::Millis(4500), Duration::Seconds(1), arrival,
                                false, Duration::Zero(), limits);
  EXPECT_TRUE(clamped.status.ok());
  EXPECT_TRUE(clamped.clamped);
  EXPECT_EQ(clamped.event, arrival);
  EXPECT_GE(clamped.uncertainty, Duration::Millis(4500));
  // ... unless absurdly far ahead.
  auto absurd = JudgeEventTime(arrival + Duration::Seconds(60), Duration::Seconds(1), arrival,
                               false, Duration::Zero(), limits);
  EXPECT_FALSE(absurd.status.ok());
  // A tolerance widens the bound.
  auto tolerated = JudgeEventTime(arrival + Duration::Millis(4500), u, arrival, true,
                                  Duration::Seconds(5), limits);
  EXPECT_TRUE(tolerated.status.ok());
  EXPECT_FALSE(tolerated.clamped);
  // Too old.
  auto old =
      JudgeEventTime(arrival - Duration::Seconds(601), u, arrival, true, Duration::Zero(), limits);
  EXPECT_EQ(old.status.code(), absl::StatusCode::kInvalidArgument);
  // Extreme values never overflow.
  auto extreme = JudgeEventTime(SessionTime::FromNanos(kMax), u, SessionTime::FromNanos(kMin), true,
                                Duration::Zero(), limits);
  EXPECT_FALSE(extreme.status.ok());
}

TEST(ValidationTest, FeedbackAndStepFieldsAreChecked) {
  const Limits limits;
  v1::FeedbackMessage f;
  f.set_client_sequence(1);
  f.set_value(1);
  f.set_event_source_ns(5);
  EXPECT_TRUE(ValidateFeedback(f, limits).ok());
  f.set_audio_sha256(std::string(32, '\x5a'));  // a voice source's kept audio (docs/voice.md)
  EXPECT_TRUE(ValidateFeedback(f, limits).ok());
  f.set_audio_sha256("short");
  EXPECT_FALSE(ValidateFeedback(f, limits).ok());
  f.clear_audio_sha256();
  f.set_value(std::numeric_limits<double>::quiet_NaN());
  EXPECT_FALSE(ValidateFeedback(f, limits).ok());
  v1::StepMessage s;
  s.set_client_sequence(1);
  s.set_start_agent_ns(10);
  EXPECT_TRUE(ValidateStep(s, limits).ok());
  s.set_end_agent_ns(5);
  EXPECT_FALSE(ValidateStep(s, limits).ok());
  v1::Hello h;
  h.set_client_id("pad-1");
  EXPECT_TRUE(ValidateHello(h).ok());
  h.set_client_id("has space");
  EXPECT_FALSE(ValidateHello(h).ok());
}

// Disciplined clocks (docs/time-model.md): the optional real-time reading
// of a feedback or step. Bounds follow the kernel's maxerror, which Linux
// clamps at 16 s and then calls the clock unsynchronised (adjtimex(2),
// ntp_gettime(3)).
TEST(ValidationTest, RealtimeReadingsAreChecked) {
  const Limits limits;
  constexpr int64_t kNow = 1'700'000'000'000'000'000;
  constexpr int64_t k16s = 16'000'000'000;
  struct Case {
    const char* what;
    int64_t realtime_ns, bound_ns;
    bool synced, ok;
  };
  const Case cases[] = {
      {"none", 0, 0, false, true},
      {"synced, 1 ms", kNow, 1'000'000, true, true},
      {"synced, just under the clamp", kNow, k16s - 1, true, true},
      {"a reading the kernel called unsynchronised, kept but unused", kNow, k16s, false, true},
      {"negative reading", -1, 1'000'000, false, false},
      {"negative bound", kNow, -1, false, false},
      {"bound beyond the clamp", kNow, k16s + 1, false, false},
      {"synced without a reading", 0, 1'000'000, true, false},
      {"synced without a bound", kNow, 0, true, false},
      {"synced at the clamp", kNow, k16s, true, false},
  };
  for (const Case& c : cases) {
    SCOPED_TRACE(c.what);
    v1::FeedbackMessage f;
    f.set_client_sequence(1);
    f.set_value(1);
    f.set_event_source_ns(5);
    f.set_event_realtime_ns(c.realtime_ns);
    f.set_realtime_bound_ns(c.bound_ns);
    f.set_realtime_synced(c.synced);
    const absl::Status fs = ValidateFeedback(f, limits);
    EXPECT_EQ(fs.ok(), c.ok) << fs.message();
    if (!fs.ok()) {
      EXPECT_EQ(fs.code(), absl::StatusCode::kInvalidArgument);
    }
    v1::StepMessage s;
    s.set_client_sequence(1);
    s.set_start_agent_ns(10);
    s.set_start_realtime_ns(c.realtime_ns);
    s.set_realtime_bound_ns(c.bound_ns);
    s.set_realtime_synced(c.synced);
    const absl::Status ss = ValidateStep(s, limits);
    EXPECT_EQ(ss.ok(), c.ok) << ss.message();
    if (!ss.ok() && c.realtime_ns < 0) {
      EXPECT_NE(ss.message().find("start_realtime_ns"), std::string::npos) << ss.message();
    }
  }
}

TEST(ValidationTest, TokensInHelloAndMetadataMustAgree) {
  EXPECT_TRUE(CheckTokensAgree("tmk_a", "").ok());
  EXPECT_TRUE(CheckTokensAgree("", "tmk_a").ok());
  EXPECT_TRUE(CheckTokensAgree("tmk_a", "tmk_a").ok());
  EXPECT_EQ(CheckTokensAgree("tmk_a", "tmk_b").code(), absl::StatusCode::kUnauthenticated);
}

TEST(ValidationTest, ContentMismatchNamesTheField) {
  v1::Record a;
  a.mutable_feedback()->set_value(1);
  a.mutable_feedback()->set_arrival_session_ns(5);
  v1::Record b = a;
  b.mutable_feedback()->set_arrival_session_ns(9);  // server-stamped: not content
  EXPECT_FALSE(DescribeContentMismatch(a, b).has_value());
  b.mutable_feedback()->set_audio_sha256(std::string(32, '\x01'));
  auto audio = DescribeContentMismatch(a, b);
  ASSERT_TRUE(audio.has_value());
  EXPECT_EQ(*audio, "audio_sha256");
  b.mutable_feedback()->set_value(-1);
  auto m = DescribeContentMismatch(a, b);
  ASSERT_TRUE(m.has_value());
  EXPECT_NE(m->find("value"), std::string::npos);
  v1::Record s1, s2;
  s1.mutable_step()->set_action("north");
  s2.mutable_step()->set_action("south");
  EXPECT_TRUE(DescribeContentMismatch(s1, s2).has_value());
  // The real-time reading is content the client sent; the server's
  // choice of route is not.
  v1::Record r1 = a;
  r1.mutable_feedback()->set_time_source(v1::TIME_SOURCE_REALTIME);
  EXPECT_FALSE(DescribeContentMismatch(a, r1).has_value());
  r1.mutable_feedback()->set_event_realtime_ns(42);
  m = DescribeContentMismatch(a, r1);
  ASSERT_TRUE(m.has_value());
  EXPECT_NE(m->find("event_realtime_ns"), std::string::npos) << *m;
}

TEST(TokenBucketTest, BurstThenRateOnAHandDrivenClock) {
  FakeMonotonic clock;
  TokenBucket b(50, 100, &clock);
  int taken = 0;
  while (b.TryTake()) ++taken;
  EXPECT_EQ(taken, 100);
  clock.Advance(Duration::Millis(100));  // 5 tokens
  taken = 0;
  while (b.TryTake()) ++taken;
  EXPECT_EQ(taken, 5);
  TokenBucket unlimited(0, 0, &clock);
  for (int i = 0; i < 1000; ++i) EXPECT_TRUE(unlimited.TryTake());
}

TEST(StreamAdmissionTest, PeerHostAndCaps) {
  EXPECT_EQ(PeerHost("ipv4:127.0.0.1:5000"), "127.0.0.1");
  EXPECT_EQ(PeerHost("ipv6:[::1]:5000"), "::1");
  EXPECT_EQ(PeerHost("ipv6:%5B::1%5D:5000"), "::1");
  StreamAdmission a(3, 2);
  EXPECT_TRUE(a.Admit("h1").ok());
  EXPECT_TRUE(a.Admit("h1").ok());
  EXPECT_EQ(a.Admit("h1").code(), absl::StatusCode::kResourceExhausted);
  EXPECT_TRUE(a.Admit("h2").ok());
  EXPECT_EQ(a.Admit("h3").code(), absl::StatusCode::kResourceExhausted);
  a.Release("h1");
  EXPECT_TRUE(a.Admit("h3").ok());
}

}  // namespace
}  // namespace tickmark::rpc

// Hostile clients and a failing ledger (issue 9): each test is named for
// what broke and fails on the code before the fix. Hermetic (127.0.0.1:0,
// temp folders); rate limits and the hello timeout run on a hand-driven
// clock; nothing sleeps to wait — waits poll a condition with a deadline.
#include <grpcpp/impl/rpc_method.h>
#include <grpcpp/support/byte_buffer.h>
#include <grpcpp/support/sync_stream.h>

#include <future>
#include <thread>

#include "tests/rpc/live_harness.h"

namespace tickmark::testing {
namespace {

using Mode = FaultLedger::Mode;

rpc::LiveService::Options Fast() {
  rpc::LiveService::Options o = TestLiveOptions();
  o.clock_wait = Duration::Millis(500);
  return o;
}

TEST(LiveHardeningTest, ALedgerFailingOnTheCallersThreadNeverHangsATrainerStream) {
  TempDir dir;
  LiveHarness h(dir.path(), Fast());
  const std::string token = h.Token(v1::ROLE_TRAINER, "ava");
  auto t = h.Trainer();
  ASSERT_TRUE(t->SendHello(token, "pad-1"));
  ASSERT_TRUE(t->Welcome());
  ASSERT_TRUE(t->Write(Feedback(1, 1.0, t->Now())));
  auto first = t->NextAck();
  ASSERT_TRUE(first);
  EXPECT_EQ(first->code(), 0) << first->message();

  // The disk fills: feedback fails fast, every other record (probes, clock
  // models) calls back on the appending thread.
  h.fault().SetFault(Mode::kFailFast, Mode::kCallbackOnCaller);
  for (uint64_t i = 2; i <= 4; ++i) {
    ASSERT_TRUE(t->Write(Feedback(i, 1.0, t->Now())));
    auto ack = t->NextAck();
    ASSERT_TRUE(ack) << "no ack for " << i << ": the stream hangs";
    EXPECT_EQ(ack->client_sequence(), i);
    // UNAVAILABLE, not the ledger's RESOURCE_EXHAUSTED: the client keeps the
    // message and sends it again later (RESOURCE_EXHAUSTED means "over your
    // rate limit", which clients drop).
    EXPECT_EQ(ack->code(), static_cast<int>(absl::StatusCode::kUnavailable));
  }
  // Room again: the same stream is served.
  h.fault().Clear();
  ASSERT_TRUE(t->Write(Feedback(5, 1.0, t->Now())));
  auto ok = t->NextAck();
  ASSERT_TRUE(ok);
  EXPECT_EQ(ok->code(), 0) << ok->message();
  EXPECT_GT(h.fault().failed_appends(), 0u);
  ASSERT_TRUE(t->Close().ok());
  h.Shutdown();  // returns: nothing is stuck
}

// Needs SessionRuntime::AppendClientRecord (session_hub.cc) to stop holding
// its own mutex around Ledger::Append: a commit callback on the caller's
// thread takes that mutex again. Enable once that lands.
TEST(LiveHardeningTest, ClientRecordCallbacksOnTheCallersThreadNeverHang) {
  TempDir dir;
  LiveHarness h(dir.path(), Fast());
  const std::string token = h.Token(v1::ROLE_TRAINER, "ava");
  auto t = h.Trainer();
  ASSERT_TRUE(t->SendHello(token, "pad-1"));
  ASSERT_TRUE(t->Welcome());
  h.fault().SetFault(Mode::kCallbackOnCaller, Mode::kCallbackOnCaller);
  ASSERT_TRUE(t->Write(Feedback(1, 1.0, t->Now())));
  auto ack = t->NextAck();
  ASSERT_TRUE(ack) << "no ack: the stream hangs";
  EXPECT_EQ(ack->code(), static_cast<int>(absl::StatusCode::kUnavailable)) << ack->message();
  // The fault cleared, the same stream stores the same message.
  h.fault().Clear();
  ASSERT_TRUE(t->Write(Feedback(1, 1.0, t->Now())));
  auto stored = t->NextAck();
  ASSERT_TRUE(stored) << "no ack after the fault cleared";
  EXPECT_EQ(stored->code(), 0) << stored->message();
  EXPECT_FALSE(stored->duplicate());  // the failed attempt left no trace
  ASSERT_TRUE(t->Close().ok());
  h.Shutdown();
}

TEST(LiveHardeningTest, AMessageThatDoesNotDecodeEndsTheStreamWithInvalidArgument) {
  TempDir dir;
  LiveHarness h(dir.path(), Fast());
  grpc::ClientContext ctx;
  ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(20));
  std::unique_ptr<grpc::ClientReaderWriter<grpc::ByteBuffer, grpc::ByteBuffer>> rw(
      grpc::internal::ClientReaderWriterFactory<grpc::ByteBuffer, grpc::ByteBuffer>::Create(
          h.channel().get(),
          grpc::internal::RpcMethod("/tickmark.v1.Live/Train",
                                    grpc::internal::RpcMethod::BIDI_STREAMING),
          &ctx));
  // Field 1 (hello), length 5, but only two bytes follow.
  const std::string garbage(
      "\x0a\x05"
      "ab",
      4);
  grpc::Slice slice(garbage);
  grpc::ByteBuffer bb(&slice, 1);
  ASSERT_TRUE(rw->Write(bb));
  grpc::ByteBuffer reply;
  EXPECT_FALSE(rw->Read(&reply));
  const grpc::Status st = rw->Finish();
  EXPECT_EQ(st.error_code(), grpc::StatusCode::INVALID_ARGUMENT) << st.error_message();
  EXPECT_NE(st.error_message().find("did not decode"), std::string::npos) << st.error_message();
  EXPECT_EQ(h.live().stats().undecodable_messages, 1u);
}

TEST(LiveHardeningTest, AStreamThatSendsNoHelloIsClosedAfterTheHelloTimeout) {
  TempDir dir;
  FakeMonotonic clock;
  rpc::LiveService::Options o = Fast();
  o.limits_clock = &clock;
  LiveHarness h(dir.path(), o);
  auto t = h.Trainer();
  auto ended = std::async(std::launch::async, [&] { return t->Next(); });
  // Drive the hand clock past the timeout until the server ends the stream.
  ASSERT_TRUE(WaitFor([&] {
    clock.Advance(Duration::Seconds(11));
    return ended.wait_for(std::chrono::milliseconds(5)) == std::future_status::ready;
  }));
  EXPECT_FALSE(ended.get());
  const grpc::Status st = t->Finish();
  EXPECT_EQ(st.error_code(), grpc::StatusCode::DEADLINE_EXCEEDED) << st.error_message();
  EXPECT_EQ(st.error_message(), "no hello within 10 s");
  EXPECT_EQ(h.live().stats().hello_timeouts, 1u);
}

TEST(LiveHardeningTest, StreamsPastThePerPeerCapAreRefusedWithResourceExhausted) {
  TempDir dir;
  rpc::LiveService::Options o = Fast();
  o.max_streams = 0;
  o.max_streams_per_peer = 2;
  LiveHarness h(dir.path(), o);
  const std::string token = h.Token(v1::ROLE_TRAINER, "ava");
  auto a = h.Trainer();
  auto b = h.Trainer();
  ASSERT_TRUE(a->SendHello(token, "pad-a") && a->Welcome());
  ASSERT_TRUE(b->SendHello(token, "pad-b") && b->Welcome());
  auto c = h.Trainer();
  c->SendHello(token, "pad-c");
  EXPECT_FALSE(c->Next());
  const grpc::Status st = c->Finish();
  EXPECT_EQ(st.error_code(), grpc::StatusCode::RESOURCE_EXHAUSTED) << st.error_message();
  EXPECT_EQ(h.live().stats().refused_streams, 1u);
  // A closed stream frees its place.
  ASSERT_TRUE(a->Close().ok());
  ASSERT_TRUE(WaitFor([&] { return h.live().admission().open() == 1; }));
  auto d = h.Trainer();
  ASSERT_TRUE(d->SendHello(token, "pad-d"));
  EXPECT_TRUE(d->Welcome());
}

TEST(LiveHardeningTest, StreamsPastTheTotalCapAreRefusedWithResourceExhausted) {
  TempDir dir;
  rpc::LiveService::Options o = Fast();
  o.max_streams = 1;
  o.max_streams_per_peer = 0;
  LiveHarness h(dir.path(), o);
  const std::string token = h.Token(v1::ROLE_TRAINER, "ava");
  auto a = h.Trainer();
  ASSERT_TRUE(a->SendHello(token, "pad-a") && a->Welcome());
  auto b = h.Trainer();
  b->SendHello(token, "pad-b");
  EXPECT_FALSE(b->Next());
  EXPECT_EQ(b->Finish().error_code(), grpc::StatusCode::RESOURCE_EXHAUSTED);
}

TEST(LiveHardeningTest, AFloodingTrainerIsRateLimitedAndAWellBehavedOneGetsEveryAck) {
  TempDir dir;
  FakeMonotonic clock;  // frozen unless advanced: no refill while the test runs
  rpc::LiveService::Options o = Fast();
  o.limits_clock = &clock;
  o.feedback_rate = 50;
  o.feedback_burst = 100;
  LiveHarness h(dir.path(), o);
  const std::string flood_token = h.Token(v1::ROLE_TRAINER, "flood");
  const std::string calm_token = h.Token(v1::ROLE_TRAINER, "calm");
  auto flood = h.Trainer();
  auto calm = h.Trainer();
  ASSERT_TRUE(flood->SendHello(flood_token, "flood-pad") && flood->Welcome());
  ASSERT_TRUE(calm->SendHello(calm_token, "calm-pad") && calm->Welcome());
  constexpr int kFlood = 300;
  std::thread flooder([&] {
    for (int i = 1; i <= kFlood; ++i)
      flood->Write(Feedback(static_cast<uint64_t>(i), 1.0, flood->Now()));
  });
  int calm_ok = 0;
  for (uint64_t i = 1; i <= 20; ++i) {
    ASSERT_TRUE(calm->Write(Feedback(i, -1.0, calm->Now())));
    auto ack = calm->NextAck();
    ASSERT_TRUE(ack);
    if (ack->code() == 0) ++calm_ok;
  }
  flooder.join();
  int ok = 0, limited = 0;
  for (int i = 0; i < kFlood; ++i) {
    auto ack = flood->NextAck();
    ASSERT_TRUE(ack);
    if (ack->code() == 0) ++ok;
    if (ack->code() == static_cast<int>(absl::StatusCode::kResourceExhausted)) ++limited;
  }
  EXPECT_EQ(calm_ok, 20);
  EXPECT_EQ(ok, 100);  // the burst
  EXPECT_EQ(limited, kFlood - 100);
  EXPECT_EQ(h.live().RateLimitedOf(h.session(), "flood-pad"), static_cast<uint64_t>(kFlood - 100));
  EXPECT_EQ(h.live().RateLimitedOf(h.session(), "calm-pad"), 0u);
  // A second stream of the same token shares its bucket.
  auto again = h.Trainer();
  ASSERT_TRUE(again->SendHello(flood_token, "flood-pad-2") && again->Welcome());
  ASSERT_TRUE(again->Write(Feedback(1, 1.0, again->Now())));
  auto refused = again->NextAck();
  ASSERT_TRUE(refused);
  EXPECT_EQ(refused->code(), static_cast<int>(absl::StatusCode::kResourceExhausted));
  // One second later there are 50 tokens again; the stream stayed open.
  clock.Advance(Duration::Seconds(1));
  ASSERT_TRUE(flood->Write(Feedback(kFlood + 1, 1.0, flood->Now())));
  auto later = flood->NextAck();
  ASSERT_TRUE(later);
  EXPECT_EQ(later->code(), 0) << later->message();
}

TEST(LiveHardeningTest, FeedbackFromTheFutureIsRefusedOnceTheClockIsProbed) {
  TempDir dir;
  LiveHarness h(dir.path(), Fast());
  const std::string token = h.Token(v1::ROLE_TRAINER, "ava");
  auto t = h.Trainer();
  ASSERT_TRUE(t->SendHello(token, "pad-1") && t->Welcome());
  // Held until the first probe is back, then mapped with the model.
  ASSERT_TRUE(t->Write(Feedback(1, 1.0, t->Now())));
  auto now_ack = t->NextAck();
  ASSERT_TRUE(now_ack);
  EXPECT_EQ(now_ack->code(), 0);
  ASSERT_GT(t->probes_answered(), 0);
  // 4.5 s after it arrives, with a loopback clock model (ms uncertainty).
  ASSERT_TRUE(t->Write(Feedback(2, 1.0, t->Now() + 4'500'000'000)));
  auto ack = t->NextAck();
  ASSERT_TRUE(ack);
  EXPECT_EQ(ack->code(), static_cast<int>(absl::StatusCode::kOutOfRange)) << ack->message();
  EXPECT_NE(ack->message().find("after its arrival"), std::string::npos) << ack->message();
  EXPECT_EQ(h.live().stats().future_events, 1u);
}

TEST(LiveHardeningTest, FeedbackFromTheFutureBeforeAnyProbeIsClampedToArrivalAndFlagged) {
  TempDir dir;
  rpc::LiveService::Options o = Fast();
  o.clock_wait = Duration::Zero();  // map through the hello at once
  LiveHarness h(dir.path(), o);
  const std::string token = h.Token(v1::ROLE_TRAINER, "ava");
  auto t = h.Trainer();
  ASSERT_TRUE(t->SendHello(token, "pad-1") && t->Welcome());
  // No probe answered yet (the client answers only while it reads acks).
  ASSERT_TRUE(t->Write(Feedback(1, 1.0, t->Now() + 2'500'000'000)));
  auto ack = t->NextAck();
  ASSERT_TRUE(ack);
  EXPECT_EQ(ack->code(), 0) << ack->message();
  EXPECT_GE(ack->uncertainty_ns(), 1'500'000'000);  // covers the shift
  EXPECT_EQ(h.live().stats().clamped_events, 1u);
}

TEST(LiveHardeningTest, AReusedClientSequenceWithOtherContentIsAnsweredAlreadyExists) {
  TempDir dir;
  LiveHarness h(dir.path(), Fast());
  const std::string token = h.Token(v1::ROLE_TRAINER, "ava");
  auto t = h.Trainer();
  ASSERT_TRUE(t->SendHello(token, "pad-1") && t->Welcome());
  const int64_t at = t->Now();
  ASSERT_TRUE(t->Write(Feedback(1, 1.0, at)));
  auto first = t->NextAck();
  ASSERT_TRUE(first);
  ASSERT_EQ(first->code(), 0);
  // The same message again: a plain duplicate.
  ASSERT_TRUE(t->Write(Feedback(1, 1.0, at)));
  auto same = t->NextAck();
  ASSERT_TRUE(same);
  EXPECT_EQ(same->code(), 0);
  EXPECT_TRUE(same->duplicate());
  // The same client sequence with another value.
  ASSERT_TRUE(t->Write(Feedback(1, -1.0, at)));
  auto other = t->NextAck();
  ASSERT_TRUE(other);
  EXPECT_EQ(other->code(), static_cast<int>(absl::StatusCode::kAlreadyExists)) << other->message();
  EXPECT_NE(other->message().find("value"), std::string::npos) << other->message();
  EXPECT_EQ(h.live().stats().content_mismatches, 1u);
}

TEST(LiveHardeningTest, AHelloTokenThatDiffersFromTheCallTokenIsRefused) {
  TempDir dir;
  LiveHarness h(dir.path(), Fast());
  const std::string ava = h.Token(v1::ROLE_TRAINER, "ava");
  const std::string ben = h.Token(v1::ROLE_TRAINER, "ben");
  auto t = h.Trainer(/*metadata_token=*/ben);
  t->SendHello(ava, "pad-1");
  EXPECT_FALSE(t->Next());
  const grpc::Status st = t->Finish();
  EXPECT_EQ(st.error_code(), grpc::StatusCode::UNAUTHENTICATED) << st.error_message();
  // The same token in both places is fine.
  auto ok = h.Trainer(ava);
  ASSERT_TRUE(ok->SendHello(ava, "pad-2"));
  EXPECT_TRUE(ok->Welcome());
}

}  // namespace
}  // namespace tickmark::testing

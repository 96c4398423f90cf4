// Issue 9.5 end to end: a trainer stream whose probe replies carry absurd
// client times (T2 = INT64_MIN, T3 = INT64_MAX; T2 = T3 = INT64_MAX). Before
// the fix the first was accepted (T3 − T2 wrapped), the clock model was built
// from it and the next feedback landed thousands of seconds off with an
// uncertainty of weeks. Now both are rejected with a recorded reason and
// the feedback maps as if they had never come.
#include <time.h>

#include <limits>

#include "tests/rpc/test_server.h"

namespace tickmark::testing {
namespace {

int64_t RealtimeNs() {
  timespec ts{};
  clock_gettime(CLOCK_REALTIME, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 + ts.tv_nsec;
}

TEST(ProbeOverflowTest, AbsurdProbeRepliesAreRejectedAndDoNotMoveTheMapping) {
  TempDir dir;
  TestServer server(dir.path());
  auto [session, admin] = server.CreateSession();
  const std::string token = server.IssueToken(session, v1::ROLE_TRAINER, "ava", admin);

  grpc::ClientContext ctx;
  ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(30));
  auto rw = server.live().Train(&ctx);
  v1::TrainerMessage hello;
  hello.mutable_hello()->set_token(token);
  hello.mutable_hello()->set_client_id("pad-1");
  hello.mutable_hello()->set_sent_client_ns(MonoNowNs());
  ASSERT_TRUE(rw->Write(hello));

  constexpr int64_t kMin = std::numeric_limits<int64_t>::min();
  constexpr int64_t kMax = std::numeric_limits<int64_t>::max();
  const std::pair<int64_t, int64_t> absurd[] = {{kMin, kMax}, {kMax, kMax}};
  int probes = 0;
  bool sent_feedback = false;
  int64_t sent_at_utc = 0;
  std::optional<v1::Ack> ack;
  v1::ServerMessage m;
  while (!ack && rw->Read(&m)) {
    if (m.has_probe()) {
      v1::TrainerMessage reply;
      auto* r = reply.mutable_probe_reply();
      r->set_probe_id(m.probe().probe_id());
      r->set_t1_session_ns(m.probe().t1_session_ns());
      if (probes < 2) {
        r->set_t2_client_ns(absurd[probes].first);
        r->set_t3_client_ns(absurd[probes].second);
      } else {
        r->set_t2_client_ns(MonoNowNs());
        r->set_t3_client_ns(MonoNowNs());
      }
      ASSERT_TRUE(rw->Write(reply));
      if (++probes == 2 && !sent_feedback) {
        // Sent after both absurd replies: held until a probe is accepted.
        sent_at_utc = RealtimeNs();
        ASSERT_TRUE(rw->Write(Feedback(1, 1.0, MonoNowNs())));
        sent_feedback = true;
      }
    } else if (m.has_ack()) {
      ack = m.ack();
    }
  }
  ASSERT_TRUE(ack) << "no ack";
  ASSERT_EQ(ack->code(), 0) << ack->message();
  // The session timeline is UTC at the session's opening advanced by the
  // monotonic clock, so for a session opened seconds ago it is within a
  // second of UTC now. Before the fix: about 8,100 s off, ±4.75e6 s.
  EXPECT_LT(std::llabs(ack->event_session_ns() - sent_at_utc), 1'000'000'000LL);
  EXPECT_LT(ack->uncertainty_ns(), 1'000'000'000LL);
  rw->WritesDone();
  while (rw->Read(&m)) {
  }
  rw->Finish();

  // Both absurd replies are in the ledger, rejected, with the reason.
  v1::SubscribeRequest sreq;
  sreq.set_session_id(session);
  sreq.set_stop_at_end(true);
  auto sctx = server.Context(admin);
  auto reader = server.live().Subscribe(sctx.get(), sreq);
  int rejected = 0;
  v1::Record r;
  while (reader->Read(&r)) {
    if (!r.has_probe() || r.probe().accepted()) continue;
    EXPECT_EQ(r.probe().reject_reason(), "rejected_out_of_range");
    ++rejected;
  }
  EXPECT_TRUE(reader->Finish().ok());
  EXPECT_EQ(rejected, 2);
}

}  // namespace
}  // namespace tickmark::testing

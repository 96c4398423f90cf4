// Live streams over real gRPC on 127.0.0.1:0: trainer and agent ingest
// (acks after commit, dedup of resends, validation at the edge, clock
// mapping) and Subscribe (replay then live, no gap, no duplicate, a stalled
// subscriber does not hold up another).
#include <cmath>
#include <limits>
#include <set>
#include <thread>

#include "tests/rpc/test_server.h"

namespace tickmark::testing {
namespace {

class LiveTest : public ::testing::Test {
 protected:
  void SetUp() override {
    std::tie(session_, admin_) = server_->CreateSession("dock rover");
    trainer_token_ = server_->IssueToken(session_, v1::ROLE_TRAINER, "ava", admin_);
    agent_token_ = server_->IssueToken(session_, v1::ROLE_AGENT, "rover-1", admin_);
  }
  v1::SessionSummary Summary() {
    v1::GetSessionRequest req;
    req.set_session_id(session_);
    v1::SessionSummary resp;
    auto ctx = server_->Context(admin_);
    EXPECT_TRUE(server_->admin().GetSession(ctx.get(), req, &resp).ok());
    return resp;
  }
  static rpc::LiveService::Options SmallBuffers() {
    rpc::LiveService::Options o = TestLiveOptions();
    o.subscriber_buffer = 8;  // so a stalled subscriber overflows quickly
    return o;
  }

  TempDir dir_;
  std::unique_ptr<TestServer> server_ = std::make_unique<TestServer>(dir_.path(), SmallBuffers());
  std::string session_, admin_, trainer_token_, agent_token_;
};

TEST_F(LiveTest, FeedbackIsAcknowledgedAfterCommitAndResendsAreDeduplicated) {
  auto t = OpenTrainer(*server_);
  ASSERT_TRUE(t->SendHello(trainer_token_, "pad-1"));
  auto welcome = t->Welcome();
  ASSERT_TRUE(welcome);
  EXPECT_EQ(welcome->subject(), "ava");
  EXPECT_EQ(welcome->last_client_sequence(), 0u);
  std::map<uint64_t, uint64_t> seq_of;
  std::map<uint64_t, v1::TrainerMessage> sent;  // a resend carries the same bytes
  for (uint64_t i = 1; i <= 5; ++i) {
    sent[i] = Feedback(i, i % 2 ? 1.0 : -1.0, t->Now());
    ASSERT_TRUE(t->Write(sent[i]));
    auto ack = t->NextAck();
    ASSERT_TRUE(ack);
    EXPECT_EQ(ack->code(), 0) << ack->message();
    EXPECT_EQ(ack->client_sequence(), i);
    EXPECT_FALSE(ack->duplicate());
    seq_of[i] = ack->sequence();
  }
  // Resend 2 and 4 on a new stream with the same client id.
  ASSERT_TRUE(t->Close().ok());
  auto again = OpenTrainer(*server_);
  ASSERT_TRUE(again->SendHello(trainer_token_, "pad-1"));
  auto w2 = again->Welcome();
  ASSERT_TRUE(w2);
  EXPECT_EQ(w2->last_client_sequence(), 5u);
  for (uint64_t i : {2u, 4u}) {
    ASSERT_TRUE(again->Write(sent[i]));
    auto ack = again->NextAck();
    ASSERT_TRUE(ack);
    EXPECT_EQ(ack->code(), 0);
    EXPECT_TRUE(ack->duplicate());
    EXPECT_EQ(ack->sequence(), seq_of[i]);  // the original's sequence
  }
  // And a resend on the same stream, back to back with the original.
  const v1::TrainerMessage six = Feedback(6, 1.0, again->Now());
  ASSERT_TRUE(again->Write(six));
  ASSERT_TRUE(again->Write(six));
  auto a1 = again->NextAck(), a2 = again->NextAck();
  ASSERT_TRUE(a1 && a2);
  EXPECT_EQ(a1->sequence(), a2->sequence());
  EXPECT_NE(a1->duplicate(), a2->duplicate());
  ASSERT_TRUE(again->Close().ok());
  EXPECT_EQ(Summary().feedback_count(), 6u);
}

TEST_F(LiveTest, HelloIsCheckedBeforeAnythingIsWritten) {
  const uint64_t before = Summary().session().last_sequence();
  struct Case {
    std::string token;
    std::string client_id;
    bool agent_stream;
    grpc::StatusCode want;
  };
  const Case cases[] = {
      {"", "pad-1", false, grpc::StatusCode::UNAUTHENTICATED},
      {"tmk_unknown", "pad-1", false, grpc::StatusCode::UNAUTHENTICATED},
      {agent_token_, "pad-1", false, grpc::StatusCode::PERMISSION_DENIED},  // wrong role
      {trainer_token_, "pad-1", true, grpc::StatusCode::PERMISSION_DENIED},
      {trainer_token_, "bad id with spaces", false, grpc::StatusCode::INVALID_ARGUMENT},
      {trainer_token_, "", false, grpc::StatusCode::INVALID_ARGUMENT},
  };
  for (const Case& c : cases) {
    grpc::Status st;
    if (c.agent_stream) {
      auto a = OpenAgent(*server_);
      a->SendHello(c.token, c.client_id);
      EXPECT_FALSE(a->Next());
      st = a->Finish();
    } else {
      auto t = OpenTrainer(*server_);
      t->SendHello(c.token, c.client_id);
      EXPECT_FALSE(t->Next());
      st = t->Finish();
    }
    EXPECT_EQ(st.error_code(), c.want) << c.client_id << ": " << st.error_message();
  }
  // A first message that is not a hello.
  auto t = OpenTrainer(*server_);
  t->Write(Feedback(1, 1, t->Now()));
  EXPECT_FALSE(t->Next());
  EXPECT_EQ(t->Finish().error_code(), grpc::StatusCode::INVALID_ARGUMENT);
  EXPECT_EQ(Summary().session().last_sequence(), before);
}

TEST_F(LiveTest, BadFeedbackIsRejectedWithAStatusAndChangesNothing) {
  auto t = OpenTrainer(*server_);
  ASSERT_TRUE(t->SendHello(trainer_token_, "pad-1"));
  ASSERT_TRUE(t->Welcome());
  const int64_t hour = 3600LL * 1'000'000'000;
  struct Case {
    const char* what;
    v1::TrainerMessage message;
  };
  std::vector<Case> cases = {
      {"NaN value", Feedback(1, std::nan(""), t->Now())},
      {"infinite value", Feedback(2, std::numeric_limits<double>::infinity(), t->Now())},
      {"value out of range", Feedback(3, 1e6, t->Now())},
      {"event an hour old", Feedback(4, 1, t->Now() - hour)},
      {"event an hour ahead", Feedback(5, 1, t->Now() + hour)},
      {"zero event time", Feedback(6, 1, 0)},
      {"client sequence 0", Feedback(0, 1, t->Now())},
  };
  v1::TrainerMessage long_input = Feedback(7, 1, t->Now());
  long_input.mutable_feedback()->set_input(std::string(65, 'k'));
  cases.push_back({"input label over 64 bytes", long_input});
  for (const Case& c : cases) {
    ASSERT_TRUE(t->Write(c.message));
    auto ack = t->NextAck();
    ASSERT_TRUE(ack) << c.what;
    // An event after its arrival (beyond its uncertainty) is refused as out
    // of range (DEVELOPERS.md, "Limits on clients"); the rest are invalid arguments.
    const grpc::StatusCode want = std::string(c.what) == "event an hour ahead"
                                      ? grpc::StatusCode::OUT_OF_RANGE
                                      : grpc::StatusCode::INVALID_ARGUMENT;
    EXPECT_EQ(ack->code(), static_cast<int>(want)) << c.what;
    EXPECT_FALSE(ack->message().empty()) << c.what;
    EXPECT_EQ(ack->sequence(), 0u) << c.what;
  }
  ASSERT_TRUE(t->Close().ok());
  EXPECT_EQ(Summary().feedback_count(), 0u);
}

TEST_F(LiveTest, BadStepsAreRejectedWithAStatusAndChangeNothing) {
  auto a = OpenAgent(*server_);
  ASSERT_TRUE(a->SendHello(agent_token_, "rover-1"));
  auto welcome = a->Welcome();
  ASSERT_TRUE(welcome);
  const int64_t now = a->Now();
  std::vector<std::pair<const char*, v1::AgentMessage>> cases;
  cases.push_back({"end before start", StepMsg(1, 1, now, now - 1000, "north")});
  cases.push_back({"two-hour step", StepMsg(2, 2, now - 1000, now + 7200LL * 1'000'000'000, "north")});
  auto big = StepMsg(3, 3, now, 0, "north");
  big.mutable_step()->set_state(std::string(welcome->max_state_bytes() + 1, 'x'));
  cases.push_back({"oversize state", big});
  auto nan_feature = StepMsg(4, 4, now, 0, "north");
  nan_feature.mutable_step()->add_features(std::nanf(""));
  cases.push_back({"non-finite feature", nan_feature});
  auto many = StepMsg(5, 5, now, 0, "north");
  for (uint32_t i = 0; i <= welcome->max_features(); ++i) many.mutable_step()->add_features(0.f);
  cases.push_back({"too many features", many});
  cases.push_back({"zero start", StepMsg(6, 6, 0, 0, "north")});
  for (auto& [what, msg] : cases) {
    ASSERT_TRUE(a->Write(msg));
    auto ack = a->NextAck();
    ASSERT_TRUE(ack) << what;
    EXPECT_EQ(ack->code(), static_cast<int>(grpc::StatusCode::INVALID_ARGUMENT)) << what;
  }
  // A good one still goes through on the same stream.
  ASSERT_TRUE(a->Write(StepMsg(7, 7, now, now + 50'000'000, "wait")));
  auto ok = a->NextAck();
  ASSERT_TRUE(ok);
  EXPECT_EQ(ok->code(), 0);
  ASSERT_TRUE(a->Close().ok());
  EXPECT_EQ(Summary().step_count(), 1u);
}

TEST_F(LiveTest, SourceClockOffsetIsRemovedByProbes) {
  // The source's clock runs 3.2 s ahead of this process's monotonic clock;
  // its feedback says "the human pressed 0.5 s ago".
  const int64_t offset = 3'200'000'000;
  auto t = OpenTrainer(*server_, offset);
  ASSERT_TRUE(t->SendHello(trainer_token_, "pad-1"));
  ASSERT_TRUE(t->Welcome());
  const int64_t before_send = MonoNowNs();
  ASSERT_TRUE(t->Write(Feedback(1, 1, t->Now() - 500'000'000)));
  auto ack = t->NextAck();
  const int64_t after_ack = MonoNowNs();
  ASSERT_TRUE(ack);
  ASSERT_EQ(ack->code(), 0) << ack->message();
  EXPECT_GT(t->probes_answered(), 0);
  ASSERT_TRUE(t->Close().ok());

  // Read the stored feedback back: arrival − event must be 0.5 s, within the
  // stated uncertainty plus the time the message spent in flight here.
  v1::SubscribeRequest req;
  req.set_session_id(session_);
  req.set_stop_at_end(true);
  req.add_kinds(v1::RECORD_KIND_FEEDBACK);
  auto ctx = server_->Context(admin_);
  auto reader = server_->live().Subscribe(ctx.get(), req);
  v1::Record r;
  ASSERT_TRUE(reader->Read(&r));
  ASSERT_TRUE(reader->Finish().ok());
  const auto& f = r.feedback();
  const int64_t lag = f.arrival_session_ns() - f.event_session_ns();
  const int64_t slack = f.uncertainty_ns() + (after_ack - before_send);
  EXPECT_NEAR(static_cast<double>(lag), 500e6, static_cast<double>(slack));
  EXPECT_LT(f.uncertainty_ns(), 50'000'000);  // loopback: far below the 3.2 s offset

  // A second source on this process's own clock: the two models' offsets
  // must differ by the 3.2 s put between the clocks, within their
  // uncertainties (simulated truth).
  auto plain = OpenTrainer(*server_, 0);
  ASSERT_TRUE(plain->SendHello(trainer_token_, "pad-2"));
  ASSERT_TRUE(plain->Welcome());
  ASSERT_TRUE(plain->Write(Feedback(1, 1, plain->Now())));
  ASSERT_TRUE(plain->NextAck());
  ASSERT_TRUE(plain->Close().ok());
  v1::SubscribeRequest models;
  models.set_session_id(session_);
  models.set_stop_at_end(true);
  models.add_kinds(v1::RECORD_KIND_CLOCK_MODEL);
  auto mctx = server_->Context(admin_);
  auto mreader = server_->live().Subscribe(mctx.get(), models);
  std::map<std::string, v1::ClockModelUpdate> last;
  while (mreader->Read(&r)) last[r.clock_model().client_id()] = r.clock_model();
  ASSERT_TRUE(mreader->Finish().ok());
  ASSERT_TRUE(last.count("pad-1") && last.count("pad-2"));
  const double measured =
      static_cast<double>(last["pad-1"].offset_ns() - last["pad-2"].offset_ns());
  const double tolerance =
      static_cast<double>(last["pad-1"].uncertainty_ns() + last["pad-2"].uncertainty_ns());
  EXPECT_NEAR(measured, static_cast<double>(offset), tolerance);
}

// Reads from a subscription until `n` records arrived or the stream ended.
std::vector<v1::Record> ReadN(grpc::ClientReader<v1::Record>* reader, size_t n) {
  std::vector<v1::Record> out;
  v1::Record r;
  while (out.size() < n && reader->Read(&r)) out.push_back(r);
  return out;
}

TEST_F(LiveTest, SubscribeReplaysThenFollowsLiveWithNoGapAndNoDuplicate) {
  auto t = OpenTrainer(*server_);
  ASSERT_TRUE(t->SendHello(trainer_token_, "pad-1"));
  ASSERT_TRUE(t->Welcome());
  for (uint64_t i = 1; i <= 20; ++i) {
    ASSERT_TRUE(t->Write(Feedback(i, 1, t->Now())));
    ASSERT_TRUE(t->NextAck());
  }
  v1::SubscribeRequest req;
  req.set_session_id(session_);
  req.set_from_sequence(0);
  req.add_kinds(v1::RECORD_KIND_FEEDBACK);
  auto ctx = server_->Context(admin_);
  auto reader = server_->live().Subscribe(ctx.get(), req);
  auto first = ReadN(reader.get(), 20);
  ASSERT_EQ(first.size(), 20u);
  for (uint64_t i = 21; i <= 60; ++i) {
    ASSERT_TRUE(t->Write(Feedback(i, 1, t->Now())));
    ASSERT_TRUE(t->NextAck());
  }
  auto live = ReadN(reader.get(), 40);
  ASSERT_EQ(live.size(), 40u);
  std::vector<v1::Record> all = first;
  all.insert(all.end(), live.begin(), live.end());
  for (size_t i = 0; i < all.size(); ++i) {
    EXPECT_EQ(all[i].feedback().client_sequence(), i + 1);
    if (i > 0) {
      EXPECT_GT(all[i].sequence(), all[i - 1].sequence());
    }
  }
  ctx->TryCancel();
  ASSERT_TRUE(t->Close().ok());
}

TEST_F(LiveTest, ResumeFromASequenceGivesExactlyTheRest) {
  auto t = OpenTrainer(*server_);
  ASSERT_TRUE(t->SendHello(trainer_token_, "pad-1"));
  ASSERT_TRUE(t->Welcome());
  for (uint64_t i = 1; i <= 30; ++i) {
    ASSERT_TRUE(t->Write(Feedback(i, 1, t->Now())));
    ASSERT_TRUE(t->NextAck());
  }
  ASSERT_TRUE(t->Close().ok());
  // Everything, then from the middle: the tail must match record for record.
  auto read_from = [&](uint64_t from) {
    v1::SubscribeRequest req;
    req.set_session_id(session_);
    req.set_from_sequence(from);
    req.set_stop_at_end(true);
    auto ctx = server_->Context(admin_);
    auto reader = server_->live().Subscribe(ctx.get(), req);
    auto out = ReadN(reader.get(), 100000);
    EXPECT_TRUE(reader->Finish().ok());
    return out;
  };
  auto all = read_from(1);
  ASSERT_GT(all.size(), 30u);
  for (size_t i = 0; i < all.size(); ++i) EXPECT_EQ(all[i].sequence(), i + 1);
  const uint64_t mid = all.size() / 2;
  auto tail = read_from(mid);
  // The tail may hold more (the trainer's disconnect is recorded as its
  // stream winds down), never less.
  ASSERT_GE(tail.size(), all.size() - mid + 1);
  for (size_t i = 0; i + mid - 1 < all.size(); ++i) {
    EXPECT_EQ(tail[i].SerializeAsString(), all[mid - 1 + i].SerializeAsString());
  }
}

TEST_F(LiveTest, AStalledSubscriberDoesNotHoldUpAnotherAndLaterGetsEverything) {
  v1::SubscribeRequest req;
  req.set_session_id(session_);
  req.add_kinds(v1::RECORD_KIND_FEEDBACK);
  auto stalled_ctx = server_->Context(admin_);
  auto stalled = server_->live().Subscribe(stalled_ctx.get(), req);  // not read for now
  auto ctx = server_->Context(admin_);
  auto reader = server_->live().Subscribe(ctx.get(), req);

  auto t = OpenTrainer(*server_);
  ASSERT_TRUE(t->SendHello(trainer_token_, "pad-1"));
  ASSERT_TRUE(t->Welcome());
  // Enough bytes to fill the stalled subscriber's transport window and its
  // 8-record inbox many times over.
  constexpr uint64_t kN = 3000;
  for (uint64_t i = 1; i <= kN; ++i) {
    auto m = Feedback(i, 1, t->Now());
    m.mutable_feedback()->set_input(std::string(60, 'k'));
    ASSERT_TRUE(t->Write(m));
  }
  for (uint64_t i = 1; i <= kN; ++i) ASSERT_TRUE(t->NextAck());
  auto got = ReadN(reader.get(), kN);
  ASSERT_EQ(got.size(), kN);
  for (uint64_t i = 0; i < kN; ++i) EXPECT_EQ(got[i].feedback().client_sequence(), i + 1);

  // The stalled one now reads: everything, in order, once.
  auto late = ReadN(stalled.get(), kN);
  ASSERT_EQ(late.size(), kN);
  for (uint64_t i = 0; i < kN; ++i) ASSERT_EQ(late[i].feedback().client_sequence(), i + 1);
  ctx->TryCancel();
  stalled_ctx->TryCancel();
  ASSERT_TRUE(t->Close().ok());
}

TEST_F(LiveTest, ClosingTheSessionEndsStreamsAndFollowersSeeTheEnd) {
  v1::SubscribeRequest req;
  req.set_session_id(session_);
  auto sctx = server_->Context(admin_);
  auto follower = server_->live().Subscribe(sctx.get(), req);
  auto t = OpenTrainer(*server_);
  ASSERT_TRUE(t->SendHello(trainer_token_, "pad-1"));
  ASSERT_TRUE(t->Welcome());

  v1::CloseSessionRequest creq;
  creq.set_session_id(session_);
  v1::Session closed;
  auto cctx = server_->Context(admin_);
  ASSERT_TRUE(server_->admin().CloseSession(cctx.get(), creq, &closed).ok());
  EXPECT_FALSE(t->Next());
  EXPECT_EQ(t->Finish().error_code(), grpc::StatusCode::FAILED_PRECONDITION);

  auto records = ReadN(follower.get(), 100000);
  ASSERT_FALSE(records.empty());
  EXPECT_TRUE(records.back().has_session_event());
  EXPECT_EQ(records.back().session_event().event(), v1::SessionEvent::KIND_CLOSED);
  EXPECT_TRUE(follower->Finish().ok());

  auto late = OpenTrainer(*server_);
  late->SendHello(trainer_token_, "pad-2");
  EXPECT_FALSE(late->Next());
  EXPECT_EQ(late->Finish().error_code(), grpc::StatusCode::FAILED_PRECONDITION);
}

TEST_F(LiveTest, StepsAreStoredWithTheirAgentAndMappedTimes) {
  auto a = OpenAgent(*server_);
  ASSERT_TRUE(a->SendHello(agent_token_, "rover-1"));
  ASSERT_TRUE(a->Welcome());
  const int64_t start = a->Now();
  auto m = StepMsg(1, 42, start, start + 100'000'000, "east");
  m.mutable_step()->set_state("xy");
  m.mutable_step()->add_features(0.25f);
  m.mutable_step()->set_episode(3);
  ASSERT_TRUE(a->Write(m));
  auto ack = a->NextAck();
  ASSERT_TRUE(ack);
  ASSERT_EQ(ack->code(), 0) << ack->message();
  ASSERT_TRUE(a->Close().ok());
  v1::SubscribeRequest req;
  req.set_session_id(session_);
  req.set_stop_at_end(true);
  req.add_kinds(v1::RECORD_KIND_STEP);
  auto ctx = server_->Context(admin_);
  auto reader = server_->live().Subscribe(ctx.get(), req);
  auto steps = ReadN(reader.get(), 10);
  ASSERT_EQ(steps.size(), 1u);
  const auto& s = steps[0].step();
  EXPECT_EQ(s.agent(), "rover-1");
  EXPECT_EQ(s.step_id(), 42u);
  EXPECT_EQ(s.episode(), 3u);
  EXPECT_EQ(s.action(), "east");
  EXPECT_EQ(s.state(), "xy");
  ASSERT_EQ(s.features_size(), 1);
  EXPECT_EQ(s.end_session_ns() - s.start_session_ns(), 100'000'000);  // drift 0 before 10 s
}

// Issue 10.6: a step sent with end 0 keeps end_session_ns 0 in its record;
// its label now carries the interval the credit engine used.
TEST_F(LiveTest, AStepSentWithoutAnEndHasTheEndUsedForCreditInItsLabel) {
  auto a = OpenAgent(*server_);
  ASSERT_TRUE(a->SendHello(agent_token_, "rover-1"));
  ASSERT_TRUE(a->Welcome());
  const int64_t start = a->Now() + 100'000'000;
  ASSERT_TRUE(a->Write(StepMsg(1, 1, start, 0, "east")));
  ASSERT_TRUE(a->Write(StepMsg(2, 2, start + 200'000'000, start + 300'000'000, "west")));
  for (int i = 0; i < 2; ++i) {
    auto ack = a->NextAck();
    ASSERT_TRUE(ack);
    ASSERT_EQ(ack->code(), 0) << ack->message();
  }
  ASSERT_TRUE(a->Close().ok());
  v1::CloseSessionRequest creq;
  creq.set_session_id(session_);
  v1::Session closed;
  auto cctx = server_->Context(admin_);
  ASSERT_TRUE(server_->admin().CloseSession(cctx.get(), creq, &closed).ok());

  v1::SubscribeRequest req;
  req.set_session_id(session_);
  req.set_stop_at_end(true);
  req.add_kinds(v1::RECORD_KIND_STEP);
  req.add_kinds(v1::RECORD_KIND_LABEL);
  auto ctx = server_->Context(admin_);
  auto reader = server_->live().Subscribe(ctx.get(), req);
  std::map<uint64_t, v1::Step> steps;
  std::map<uint64_t, v1::Label> labels;
  for (const v1::Record& r : ReadN(reader.get(), 100)) {
    if (r.has_step()) steps[r.sequence()] = r.step();
    if (r.has_label()) labels[r.label().step_sequence()] = r.label();
  }
  ASSERT_EQ(steps.size(), 2u);
  const auto first = steps.begin(), second = std::next(steps.begin());
  EXPECT_EQ(first->second.end_session_ns(), 0);  // the record keeps what was sent
  ASSERT_TRUE(labels.count(first->first));
  const v1::Label& label = labels[first->first];
  EXPECT_EQ(label.start_session_ns(), first->second.start_session_ns());
  EXPECT_EQ(label.end_session_ns(), second->second.start_session_ns());
  ASSERT_TRUE(labels.count(second->first));
  EXPECT_EQ(labels[second->first].end_session_ns(), second->second.end_session_ns());
}

TEST_F(LiveTest, ImpossibleProbeAnswersAreRejectedCountedAndKept) {
  // A raw stream that answers the first probe with T3 before T2.
  grpc::ClientContext ctx;
  auto rw = server_->live().Train(&ctx);
  v1::TrainerMessage hello;
  hello.mutable_hello()->set_token(trainer_token_);
  hello.mutable_hello()->set_client_id("pad-bad-clock");
  hello.mutable_hello()->set_sent_client_ns(MonoNowNs());
  ASSERT_TRUE(rw->Write(hello));
  v1::ServerMessage m;
  bool answered = false;
  while (!answered && rw->Read(&m)) {
    if (!m.has_probe()) continue;
    v1::TrainerMessage reply;
    auto* p = reply.mutable_probe_reply();
    p->set_probe_id(m.probe().probe_id());
    p->set_t1_session_ns(m.probe().t1_session_ns());
    p->set_t2_client_ns(MonoNowNs());
    p->set_t3_client_ns(MonoNowNs() - 5'000'000);  // T3 < T2: impossible
    ASSERT_TRUE(rw->Write(reply));
    answered = true;
  }
  ASSERT_TRUE(answered);
  rw->WritesDone();
  while (rw->Read(&m)) {
  }
  rw->Finish();
  // The probe record is appended before the stream ends but commits on the
  // ledger's thread: wait (with a deadline) until the ledger counts it.
  const auto until = std::chrono::steady_clock::now() + std::chrono::seconds(10);
  while (Summary().rejected_probe_count() == 0 && std::chrono::steady_clock::now() < until) {
    std::this_thread::sleep_for(std::chrono::milliseconds(2));
  }
  // The rejected probe is in the ledger, flagged and counted.
  v1::SubscribeRequest req;
  req.set_session_id(session_);
  req.set_stop_at_end(true);
  req.add_kinds(v1::RECORD_KIND_PROBE);
  auto sctx = server_->Context(admin_);
  auto reader = server_->live().Subscribe(sctx.get(), req);
  auto probes = ReadN(reader.get(), 100);
  ASSERT_FALSE(probes.empty());
  EXPECT_FALSE(probes[0].probe().accepted());
  EXPECT_EQ(probes[0].probe().reject_reason(), "rejected_reversed");
  EXPECT_EQ(Summary().rejected_probe_count(), 1u);
}

}  // namespace
}  // namespace tickmark::testing

// Delivery to subscribers (docs/architecture.md §6) over real gRPC on 127.0.0.1:0,
// while an agent and a trainer stream at the same time so that every kind
// of record is in flight (steps, feedback, probes, clock models, client
// events, credit, unmatched): a subscriber killed and resumed from its last
// processed sequence + 1 at seeded-random points gets every sequence exactly
// once and in order; a subscriber that never reads holds up neither ingest
// nor another subscriber. The same holds for SubscribeBatches, which carries
// exactly what Subscribe does. Completeness and order only: no timing
// assertions.
#include <atomic>
#include <random>
#include <set>
#include <span>
#include <thread>

#include "server/rpc/subscribe_reactor.h"
#include "tests/rpc/test_server.h"

namespace tickmark::testing {
namespace {

constexpr int64_t kOneMs = 1'000'000;

class DeliveryTest : public ::testing::Test {
 protected:
  static rpc::LiveService::Options SmallBuffers() {
    rpc::LiveService::Options o = TestLiveOptions();
    o.subscriber_buffer = 16;  // overflow into ledger catch-up often
    return o;
  }

  void SetUp() override {
    std::tie(session_, admin_) = server_.CreateSession("dock rover, delivery");
    trainer_token_ = server_.IssueToken(session_, v1::ROLE_TRAINER, "ava", admin_);
    agent_token_ = server_.IssueToken(session_, v1::ROLE_AGENT, "rover-1", admin_);
    observer_token_ = server_.IssueToken(session_, v1::ROLE_OBSERVER, "", admin_);
  }

  // Publishes `n` open steps (each ends when the next starts) `spacing_ms`
  // apart with a `state_bytes` payload, as fast as acks come back. They
  // begin 3 s in the past, so that feedback sent while they stream has
  // steps in reach at once.
  void RunAgent(int n, size_t state_bytes, int64_t spacing_ms) {
    auto a = OpenAgent(server_);
    if (!a->SendHello(agent_token_, "rover-1") || !a->Welcome()) {
      ADD_FAILURE() << "agent hello failed";
      return;
    }
    const int64_t base = a->Now() - 3000 * kOneMs;
    for (int i = 1; i <= n; ++i) {
      const int64_t start = base + i * spacing_ms * kOneMs;
      const auto id = static_cast<uint64_t>(i);
      auto m = StepMsg(id, id, start, 0, i % 5 == 0 ? "wait" : "north");
      m.mutable_step()->set_state(std::string(state_bytes, static_cast<char>('a' + i % 26)));
      if (!a->Write(m)) break;
      auto ack = a->NextAck();
      if (!ack || ack->code() != 0) {
        ADD_FAILURE() << "step " << i << " not acknowledged";
        break;
      }
    }
    EXPECT_TRUE(a->Close().ok());
  }

  // Sends `n` feedback, judged 300 ms before they are sent; every tenth is
  // 30 s old (nothing in reach yet: reported unmatched).
  void RunTrainer(int n) {
    auto t = OpenTrainer(server_);
    if (!t->SendHello(trainer_token_, "ava-pad") || !t->Welcome()) {
      ADD_FAILURE() << "trainer hello failed";
      return;
    }
    for (int i = 1; i <= n; ++i) {
      const int64_t age = i % 10 == 0 ? 30'000 * kOneMs : 300 * kOneMs;
      auto m = Feedback(static_cast<uint64_t>(i), i % 3 ? 1.0 : -1.0, t->Now() - age);
      m.mutable_feedback()->set_input("key:" + std::string(40, 'g'));
      if (!t->Write(m)) break;
      auto ack = t->NextAck();
      if (!ack || ack->code() != 0) {
        ADD_FAILURE() << "feedback " << i << " not acknowledged";
        break;
      }
    }
    EXPECT_TRUE(t->Close().ok());
  }

  void CloseSession() {
    v1::CloseSessionRequest req;
    req.set_session_id(session_);
    v1::Session closed;
    auto ctx = server_.Context(admin_);
    EXPECT_TRUE(server_.admin().CloseSession(ctx.get(), req, &closed).ok());
  }

  // Runs the agent and the trainer on their own threads, then closes the
  // session (its "closed" record is the last one a subscriber receives).
  std::thread Produce(int steps, int64_t spacing_ms, size_t state_bytes, int feedback) {
    return std::thread([this, steps, spacing_ms, state_bytes, feedback] {
      std::thread agent([&] { RunAgent(steps, state_bytes, spacing_ms); });
      std::thread trainer([&] { RunTrainer(feedback); });
      agent.join();
      trainer.join();
      CloseSession();
    });
  }

  TempDir dir_;
  TestServer server_{dir_.path(), SmallBuffers()};
  std::string session_, admin_, trainer_token_, agent_token_, observer_token_;
};

bool IsClosed(const v1::Record& r) {
  return r.has_session_event() && r.session_event().event() == v1::SessionEvent::KIND_CLOSED;
}

// The records one message of a subscription carries.
std::span<const v1::Record> RecordsOf(const v1::Record& r) { return {&r, 1}; }
const google::protobuf::RepeatedPtrField<v1::Record>& RecordsOf(const v1::RecordBatch& b) {
  return b.records();
}

// What a subscriber killed and resumed again and again received.
struct Resumed {
  std::vector<uint64_t> sequences;
  int connections = 0;
  bool saw_closed = false;
};

// Subscribes from the last processed sequence + 1 again and again until the
// session's "closed" record (at most 60 s). Each call is killed after a
// seeded-random number of messages, 0 to max_messages (whatever was in
// flight is lost to it); `each` sees every message read.
template <class Message, class Open, class Each>
Resumed KillAndResume(const std::string& session, TestServer& server, const std::string& token,
                      uint32_t seed, int max_messages, Open open, Each each) {
  std::mt19937 rng(seed);  // seeded: the kill points repeat
  std::uniform_int_distribution<int> messages_before_kill(0, max_messages);
  Resumed out;
  uint64_t next = 1;
  const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(60);
  while (!out.saw_closed && std::chrono::steady_clock::now() < deadline) {
    ++out.connections;
    v1::SubscribeRequest req;
    req.set_session_id(session);
    req.set_from_sequence(next);
    auto ctx = server.Context(token);
    auto reader = open(ctx.get(), req);
    const int budget = messages_before_kill(rng);  // 0: killed before reading any
    Message m;
    for (int i = 0; i < budget && !out.saw_closed && reader->Read(&m); ++i) {
      each(m);
      for (const v1::Record& r : RecordsOf(m)) {
        out.sequences.push_back(r.sequence());
        next = r.sequence() + 1;  // the last processed sequence + 1
        if (IsClosed(r)) out.saw_closed = true;
      }
    }
    ctx->TryCancel();
    while (reader->Read(&m)) {
    }
    reader->Finish();
  }
  return out;
}

TEST_F(DeliveryTest, KilledAndResumedAtRandomPointsGetsEverySequenceOnceInOrder) {
  std::thread producer = Produce(/*steps=*/120, /*spacing_ms=*/50, /*state_bytes=*/256,
                                 /*feedback=*/150);
  std::set<int> kinds_seen;
  const Resumed got = KillAndResume<v1::Record>(
      session_, server_, observer_token_, 20261202, /*max_messages=*/40,
      [this](grpc::ClientContext* ctx, const v1::SubscribeRequest& req) {
        return server_.live().Subscribe(ctx, req);
      },
      [&](const v1::Record& r) { kinds_seen.insert(r.body_case()); });
  producer.join();
  ASSERT_TRUE(got.saw_closed) << "the subscriber never reached the session's end";
  ASSERT_FALSE(got.sequences.empty());
  for (size_t i = 0; i < got.sequences.size(); ++i) {
    ASSERT_EQ(got.sequences[i], i + 1) << "after " << got.connections << " connections";
  }
  EXPECT_GT(got.connections, 20);
  // Mixed kinds went through the resumes.
  for (int kind : {v1::Record::kStep, v1::Record::kFeedback, v1::Record::kProbe,
                   v1::Record::kClockModel, v1::Record::kCredit, v1::Record::kUnmatched}) {
    EXPECT_TRUE(kinds_seen.count(kind)) << "no record of body kind " << kind;
  }
}

TEST_F(DeliveryTest, AStalledSubscriberDelaysNeitherIngestNorAnother) {
  v1::SubscribeRequest req;
  req.set_session_id(session_);
  auto stalled_ctx = server_.Context(observer_token_);
  auto stalled = server_.live().Subscribe(stalled_ctx.get(), req);  // not read until the end
  auto ctx = server_.Context(observer_token_);
  auto reader = server_.live().Subscribe(ctx.get(), req);

  // 1500 steps of 4 KiB: several MB, far past the stalled stream's transport
  // window and its 16-record inbox.
  std::thread producer = Produce(/*steps=*/1500, /*spacing_ms=*/5, /*state_bytes=*/4096,
                                 /*feedback=*/40);
  std::vector<uint64_t> got;
  v1::Record r;
  while (reader->Read(&r)) {
    got.push_back(r.sequence());
    if (IsClosed(r)) break;
  }
  // Ingest finished and the session closed while one subscriber read nothing.
  producer.join();
  ASSERT_FALSE(got.empty());
  ASSERT_TRUE(IsClosed(r));
  for (size_t i = 0; i < got.size(); ++i) ASSERT_EQ(got[i], i + 1);
  EXPECT_TRUE(reader->Finish().ok());

  // The stalled one reads now: the same sequences, once, in order.
  std::vector<uint64_t> late;
  while (stalled->Read(&r)) late.push_back(r.sequence());
  EXPECT_TRUE(stalled->Finish().ok());
  EXPECT_EQ(late, got);
}

// SubscribeBatches (contract 1.1): the same guarantees, several records to a
// message. Killed after a seeded-random number of batches (whatever was in
// flight is lost to it) and resumed from the last processed sequence + 1.
TEST_F(DeliveryTest, BatchesKilledAndResumedGetEverySequenceOnceInOrder) {
  std::thread producer = Produce(/*steps=*/120, /*spacing_ms=*/50, /*state_bytes=*/256,
                                 /*feedback=*/150);
  size_t largest = 0;
  const Resumed got = KillAndResume<v1::RecordBatch>(
      session_, server_, observer_token_, 20261203, /*max_messages=*/6,
      [this](grpc::ClientContext* ctx, const v1::SubscribeRequest& req) {
        return server_.live().SubscribeBatches(ctx, req);
      },
      [&](const v1::RecordBatch& b) {
        EXPECT_GT(b.records_size(), 0) << "an empty batch";
        EXPECT_LE(b.records_size(), rpc::BatchSubscribeReactor::kMaxBatchRecords);
        largest = std::max(largest, static_cast<size_t>(b.records_size()));
      });
  producer.join();
  ASSERT_TRUE(got.saw_closed) << "the subscriber never reached the session's end";
  for (size_t i = 0; i < got.sequences.size(); ++i) {
    ASSERT_EQ(got.sequences[i], i + 1) << "after " << got.connections << " connections";
  }
  EXPECT_GT(got.connections, 10);
  // Resumes replay from the ledger, and credit comes in bursts: batches of
  // more than one record must have happened.
  EXPECT_GT(largest, 1u);
}

// A finished session read both ways, whole and filtered by kind: the same
// records, byte for byte, in the same order.
TEST_F(DeliveryTest, BatchesCarryWhatSubscribeCarries) {
  Produce(/*steps=*/60, /*spacing_ms=*/10, /*state_bytes=*/64, /*feedback=*/60).join();
  for (bool filtered : {false, true}) {
    v1::SubscribeRequest req;
    req.set_session_id(session_);
    if (filtered) {
      req.add_kinds(v1::RECORD_KIND_STEP);
      req.add_kinds(v1::RECORD_KIND_CREDIT);
    }
    std::vector<std::string> one_by_one, batched;
    {
      auto ctx = server_.Context(observer_token_);
      auto reader = server_.live().Subscribe(ctx.get(), req);
      v1::Record r;
      while (reader->Read(&r)) one_by_one.push_back(r.SerializeAsString());
      ASSERT_TRUE(reader->Finish().ok());
    }
    {
      auto ctx = server_.Context(observer_token_);
      auto reader = server_.live().SubscribeBatches(ctx.get(), req);
      v1::RecordBatch b;
      while (reader->Read(&b)) {
        for (const v1::Record& r : b.records()) batched.push_back(r.SerializeAsString());
      }
      ASSERT_TRUE(reader->Finish().ok());
    }
    ASSERT_GT(one_by_one.size(), 100u) << (filtered ? "steps and credit" : "everything");
    EXPECT_EQ(batched, one_by_one) << (filtered ? "steps and credit" : "everything");
  }
}

}  // namespace
}  // namespace tickmark::testing

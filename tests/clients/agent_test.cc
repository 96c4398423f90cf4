// The C++ agent library against a real in-process tickmarkd that is
// restarted mid-stream on the same port and ledger.
#include "clients/agent/agent.h"

#include <algorithm>
#include <atomic>
#include <filesystem>
#include <fstream>
#include <set>

#include <gtest/gtest.h>

#include "server/rpc/server.h"
#include "tests/clients/fake_live.h"
#include "tickmark/v1/admin.grpc.pb.h"

namespace tickmark::agent {
namespace {

namespace v1 = tickmark::v1;

class AgentTest : public ::testing::Test {
 protected:
  void SetUp() override {
    std::string tmpl = (std::filesystem::temp_directory_path() / "tm-agent-XXXXXX").string();
    dir_ = mkdtemp(tmpl.data());
    StartServer("127.0.0.1:0");
    port_ = server_->port();
    std::ifstream in(server_->operator_token_path());
    std::getline(in, operator_);
    auto channel = grpc::CreateChannel(Address(), grpc::InsecureChannelCredentials());
    auto admin = v1::SessionAdmin::NewStub(channel);
    v1::CreateSessionRequest create;
    create.set_title("agent library test");
    v1::CreateSessionResponse created;
    grpc::ClientContext c1;
    c1.AddMetadata("authorization", "Bearer " + operator_);
    ASSERT_TRUE(admin->CreateSession(&c1, create, &created).ok());
    session_ = created.session().id();
    v1::IssueTokenRequest issue;
    issue.set_session_id(session_);
    issue.set_role(v1::ROLE_AGENT);
    issue.set_subject("rover-1");
    v1::IssueTokenResponse token;
    grpc::ClientContext c2;
    c2.AddMetadata("authorization", "Bearer " + created.admin_secret());
    ASSERT_TRUE(admin->IssueToken(&c2, issue, &token).ok());
    token_ = token.secret();
  }
  void TearDown() override {
    server_.reset();
    std::filesystem::remove_all(dir_);
  }
  void StartServer(const std::string& listen) {
    rpc::ServerOptions o;
    o.listen = listen;
    o.data_dir = dir_;
    auto s = rpc::TickmarkServer::Start(o);
    ASSERT_TRUE(s.ok()) << s.status().message();
    server_ = std::move(*s);
  }
  std::string Address() const { return "127.0.0.1:" + std::to_string(port_); }

  std::string dir_, operator_, session_, token_;
  int port_ = 0;
  std::unique_ptr<rpc::TickmarkServer> server_;
};

TEST_F(AgentTest, ConnectPublishAndReadBack) {
  Agent::Options o;
  o.server = Address();
  o.token = token_;
  o.client_id = "rover-cpp";
  auto agent = Agent::Connect(o);
  ASSERT_TRUE(agent.ok()) << agent.status().message();
  EXPECT_EQ((*agent)->session_id(), session_);
  EXPECT_EQ((*agent)->name(), "rover-1");
  for (int i = 0; i < 10; ++i) {
    Step s;
    s.action = i % 2 ? "east" : "north";
    s.state = std::to_string(i);
    s.features = {static_cast<float>(i)};
    auto id = (*agent)->Publish(std::move(s));
    ASSERT_TRUE(id.ok());
    EXPECT_EQ(*id, static_cast<uint64_t>(i + 1));
  }
  ASSERT_TRUE((*agent)->Flush(std::chrono::seconds(10)).ok());
  auto sub = (*agent)->Subscribe({.from_sequence = 1, .kinds = {v1::RECORD_KIND_STEP},
                                  .follow = false});
  std::vector<v1::Step> steps;
  while (auto r = sub->Next(std::chrono::seconds(10))) steps.push_back(r->step());
  EXPECT_TRUE(sub->done());
  ASSERT_EQ(steps.size(), 10u);
  EXPECT_EQ(steps[3].state(), "3");
  EXPECT_EQ(steps[3].action(), "east");
  EXPECT_EQ(steps[9].step_id(), 10u);
}

TEST_F(AgentTest, RefusedTokenSaysWhy) {
  Agent::Options o;
  o.server = Address();
  o.token = "tmk_not-a-token";
  auto agent = Agent::Connect(o);
  EXPECT_EQ(agent.status().code(), absl::StatusCode::kUnauthenticated);
}

TEST_F(AgentTest, ServerRestartedMidStreamLosesAndDuplicatesNothing) {
  Agent::Options o;
  o.server = Address();
  o.token = token_;
  o.client_id = "rover-restart";
  auto agent = Agent::Connect(o);
  ASSERT_TRUE(agent.ok()) << agent.status().message();
  auto follower = (*agent)->Subscribe({.from_sequence = 1, .kinds = {v1::RECORD_KIND_STEP}});
  auto publish = [&](int from, int to) {
    for (int i = from; i < to; ++i) {
      Step s;
      s.action = "east";
      s.state = std::to_string(i);
      ASSERT_TRUE((*agent)->Publish(std::move(s)).ok());
    }
  };
  publish(0, 40);
  ASSERT_TRUE((*agent)->Flush(std::chrono::seconds(10)).ok());
  server_->Shutdown(Duration::Millis(200));
  server_.reset();
  publish(40, 80);  // queued while the server is down
  StartServer(Address());
  ASSERT_TRUE((*agent)->Flush(std::chrono::seconds(30)).ok());
  EXPECT_GE((*agent)->status().reconnects, 1u);

  std::vector<std::string> states;
  std::vector<uint64_t> seqs;
  while (states.size() < 80) {
    auto r = follower->Next(std::chrono::seconds(30));
    ASSERT_TRUE(r) << "only " << states.size() << " steps arrived; " << follower->status();
    states.push_back(r->step().state());
    seqs.push_back(r->sequence());
  }
  EXPECT_EQ(std::set<std::string>(states.begin(), states.end()).size(), 80u);
  for (size_t i = 1; i < seqs.size(); ++i) EXPECT_GT(seqs[i], seqs[i - 1]);
  EXPECT_EQ(follower->position(), seqs.back());
  // The ledger holds each step exactly once.
  auto check = (*agent)->Subscribe({.from_sequence = 1, .kinds = {v1::RECORD_KIND_STEP},
                                    .follow = false});
  size_t n = 0;
  while (check->Next(std::chrono::seconds(10))) ++n;
  EXPECT_EQ(n, 80u);
}

// Regression: a server that took the agent's stream but never welcomed it
// held Agent::Connect until connect_timeout, however long that was. The
// attempt is now given up after hello_timeout and retried.
TEST(AgentHelloTest, ServerThatNeverWelcomesIsRetried) {
  testing::FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](testing::FakeLive::Script& s) { s.silent_hellos = {1}; });
  Agent::Options options;
  options.server = target;
  options.token = "tm_test_token";
  options.client_id = "host:test:agent-silent";
  options.hello_timeout = std::chrono::milliseconds(200);
  options.connect_timeout = std::chrono::milliseconds(60'000);
  auto agent = Agent::Connect(options);
  ASSERT_TRUE(agent.ok()) << agent.status();
  EXPECT_EQ((*agent)->status().connections, 1u);
  EXPECT_EQ((*agent)->status().last_error.code(), absl::StatusCode::kDeadlineExceeded);
  Step step;
  step.action = "north";
  ASSERT_TRUE((*agent)->Publish(step).ok());
  ASSERT_TRUE((*agent)->Flush(std::chrono::milliseconds(30'000)).ok());
  EXPECT_EQ(fake.hellos(), 2);
  EXPECT_EQ(fake.stored().size(), 1u);
}

// FakeLive plus a Subscribe whose first call the "server" cancels, as a
// server that shuts down does; later calls send steps from_sequence..3.
class CancellingSubscribeLive final : public testing::FakeLive {
 public:
  grpc::Status Subscribe(grpc::ServerContext*, const v1::SubscribeRequest* req,
                         grpc::ServerWriter<v1::Record>* out) override {
    if (calls_.fetch_add(1) == 0) return grpc::Status(grpc::StatusCode::CANCELLED, "shutting down");
    for (uint64_t seq = std::max<uint64_t>(req->from_sequence(), 1); seq <= 3; ++seq) {
      v1::Record r;
      r.set_sequence(seq);
      r.mutable_step()->set_state(std::to_string(seq));
      if (!out->Write(r)) break;
    }
    return grpc::Status::OK;
  }
  int calls() const { return calls_.load(); }

 private:
  std::atomic<int> calls_{0};
};

// Regression: a subscription whose call the server cancelled (CANCELLED,
// e.g. while it shut down for a restart) stopped for good with 0 records
// instead of resuming like after any other broken connection.
TEST(AgentSubscribeTest, ResumesAfterServerCancelledTheCall) {
  CancellingSubscribeLive fake;
  const std::string target = fake.Start();
  Agent::Options options;
  options.server = target;
  options.token = "tm_test_token";
  options.client_id = "host:test:agent-cancelled";
  auto agent = Agent::Connect(options);
  ASSERT_TRUE(agent.ok()) << agent.status();
  auto sub = (*agent)->Subscribe({.from_sequence = 1, .kinds = {}, .follow = false});
  std::vector<std::string> states;
  while (auto r = sub->Next(std::chrono::seconds(30))) states.push_back(r->step().state());
  EXPECT_EQ(states, (std::vector<std::string>{"1", "2", "3"})) << sub->status();
  EXPECT_TRUE(sub->status().ok()) << sub->status();
  EXPECT_EQ(fake.calls(), 2);
}

}  // namespace
}  // namespace tickmark::agent

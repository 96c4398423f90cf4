// Test helpers: an in-process tickmarkd on 127.0.0.1:0 in a temp folder,
// and a synchronous trainer/agent stream that answers clock probes itself.
#ifndef TICKMARK_TESTS_RPC_TEST_SERVER_H_
#define TICKMARK_TESTS_RPC_TEST_SERVER_H_

#include <time.h>

#include <filesystem>
#include <fstream>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include <grpcpp/grpcpp.h>
#include <gtest/gtest.h>

#include "server/rpc/server.h"
#include "tickmark/v1/admin.grpc.pb.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::testing {

namespace v1 = tickmark::v1;

inline int64_t MonoNowNs() {
  timespec ts{};
  clock_gettime(CLOCK_MONOTONIC, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 + ts.tv_nsec;
}

// A fresh temp folder, removed on destruction.
class TempDir {
 public:
  TempDir() {
    std::string tmpl = (std::filesystem::temp_directory_path() / "tickmark-test-XXXXXX").string();
    path_ = mkdtemp(tmpl.data());
  }
  ~TempDir() {
    std::error_code ec;
    std::filesystem::remove_all(path_, ec);
  }
  const std::string& path() const { return path_; }

 private:
  std::string path_;
};

// Live options for tests: the production defaults, except rate limits far
// above what a test sends (tests push feedback as fast as they can).
inline rpc::LiveService::Options TestLiveOptions() {
  rpc::LiveService::Options o;
  o.feedback_rate = 1e6;
  o.feedback_burst = 1e6;
  o.step_rate = 1e6;
  o.step_burst = 1e6;
  return o;
}

class TestServer {
 public:
  explicit TestServer(const std::string& dir,
                      rpc::LiveService::Options live = TestLiveOptions()) {
    rpc::ServerOptions o;
    o.listen = "127.0.0.1:0";
    o.data_dir = dir;
    o.live = live;
    auto s = rpc::TickmarkServer::Start(o);
    EXPECT_TRUE(s.ok()) << s.status().message();
    server_ = std::move(*s);
    std::ifstream in(server_->operator_token_path());
    std::getline(in, operator_token_);
    channel_ = grpc::CreateChannel("127.0.0.1:" + std::to_string(server_->port()),
                                   grpc::InsecureChannelCredentials());
    admin_ = v1::SessionAdmin::NewStub(channel_);
    live_ = v1::Live::NewStub(channel_);
  }

  void Shutdown() { server_->Shutdown(Duration::Seconds(1)); }

  const std::string& operator_token() const { return operator_token_; }
  v1::SessionAdmin::Stub& admin() { return *admin_; }
  v1::Live::Stub& live() { return *live_; }
  rpc::TickmarkServer& server() { return *server_; }

  std::unique_ptr<grpc::ClientContext> Context(const std::string& token) {
    auto ctx = std::make_unique<grpc::ClientContext>();
    if (!token.empty()) ctx->AddMetadata("authorization", "Bearer " + token);
    ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(20));
    return ctx;
  }

  // Every record of `kind` in the session, read with Live.Subscribe up to the
  // current end; a failed subscription fails the calling test.
  std::vector<v1::Record> Records(const std::string& session, const std::string& token,
                                  v1::RecordKind kind) {
    v1::SubscribeRequest req;
    req.set_session_id(session);
    req.set_from_sequence(1);
    req.set_stop_at_end(true);
    req.add_kinds(kind);
    auto ctx = Context(token);
    auto reader = live().Subscribe(ctx.get(), req);
    std::vector<v1::Record> out;
    v1::Record r;
    while (reader->Read(&r)) out.push_back(r);
    const grpc::Status s = reader->Finish();
    EXPECT_TRUE(s.ok()) << s.error_message();
    return out;
  }

  // Creates a session; returns {session id, its admin secret}.
  std::pair<std::string, std::string> CreateSession(const std::string& title = "test") {
    v1::CreateSessionRequest req;
    req.set_title(title);
    v1::CreateSessionResponse resp;
    auto ctx = Context(operator_token_);
    grpc::Status s = admin_->CreateSession(ctx.get(), req, &resp);
    EXPECT_TRUE(s.ok()) << s.error_message();
    return {resp.session().id(), resp.admin_secret()};
  }

  std::string IssueToken(const std::string& session, v1::Role role, const std::string& subject,
                         const std::string& admin_token) {
    v1::IssueTokenRequest req;
    req.set_session_id(session);
    req.set_role(role);
    req.set_subject(subject);
    v1::IssueTokenResponse resp;
    auto ctx = Context(admin_token);
    grpc::Status s = admin_->IssueToken(ctx.get(), req, &resp);
    EXPECT_TRUE(s.ok()) << s.error_message();
    return resp.secret();
  }

 private:
  std::unique_ptr<rpc::TickmarkServer> server_;
  std::string operator_token_;
  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<v1::SessionAdmin::Stub> admin_;
  std::unique_ptr<v1::Live::Stub> live_;
};

// A synchronous ingest stream (Train or Act) that answers probes while it
// waits for what the test asked for. `clock_offset_ns` is added to the
// client's clock, to play a source whose clock is off.
template <typename Out>
class SyncStream {
 public:
  using Rw = grpc::ClientReaderWriter<Out, v1::ServerMessage>;

  SyncStream(std::unique_ptr<grpc::ClientContext> ctx, std::unique_ptr<Rw> rw,
             int64_t clock_offset_ns)
      : ctx_(std::move(ctx)), rw_(std::move(rw)), offset_(clock_offset_ns) {}

  int64_t Now() const { return MonoNowNs() + offset_; }

  bool SendHello(const std::string& token, const std::string& client_id) {
    Out m;
    m.mutable_hello()->set_token(token);
    m.mutable_hello()->set_client_id(client_id);
    m.mutable_hello()->set_software("test");
    m.mutable_hello()->set_sent_client_ns(Now());
    return rw_->Write(m);
  }
  bool Write(const Out& m) { return rw_->Write(m); }

  // Reads until a message that is not a probe; answers probes on the way.
  std::optional<v1::ServerMessage> Next() {
    v1::ServerMessage m;
    while (rw_->Read(&m)) {
      if (m.has_probe()) {
        const int64_t t2 = Now();
        Out reply;
        auto* r = reply.mutable_probe_reply();
        r->set_probe_id(m.probe().probe_id());
        r->set_t1_session_ns(m.probe().t1_session_ns());
        r->set_t2_client_ns(t2);
        r->set_t3_client_ns(Now());
        rw_->Write(reply);
        ++probes_answered_;
        continue;
      }
      return m;
    }
    return std::nullopt;
  }

  std::optional<v1::Welcome> Welcome() {
    auto m = Next();
    if (!m || !m->has_welcome()) return std::nullopt;
    return m->welcome();
  }
  std::optional<v1::Ack> NextAck() {
    auto m = Next();
    if (!m || !m->has_ack()) return std::nullopt;
    return m->ack();
  }

  grpc::Status Close() {
    rw_->WritesDone();
    v1::ServerMessage m;
    while (Next()) {
    }
    return rw_->Finish();
  }
  // After Next() returned nullopt: the final status.
  grpc::Status Finish() { return rw_->Finish(); }
  int probes_answered() const { return probes_answered_; }

 private:
  std::unique_ptr<grpc::ClientContext> ctx_;
  std::unique_ptr<Rw> rw_;
  int64_t offset_;
  int probes_answered_ = 0;
};

using TrainerStream = SyncStream<v1::TrainerMessage>;
using AgentStream = SyncStream<v1::AgentMessage>;

inline std::unique_ptr<TrainerStream> OpenTrainer(TestServer& s, int64_t offset_ns = 0) {
  auto ctx = std::make_unique<grpc::ClientContext>();
  ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(30));
  auto rw = s.live().Train(ctx.get());
  return std::make_unique<TrainerStream>(std::move(ctx), std::move(rw), offset_ns);
}

inline std::unique_ptr<AgentStream> OpenAgent(TestServer& s, int64_t offset_ns = 0) {
  auto ctx = std::make_unique<grpc::ClientContext>();
  ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(30));
  auto rw = s.live().Act(ctx.get());
  return std::make_unique<AgentStream>(std::move(ctx), std::move(rw), offset_ns);
}

inline v1::TrainerMessage Feedback(uint64_t seq, double value, int64_t event_ns) {
  v1::TrainerMessage m;
  auto* f = m.mutable_feedback();
  f->set_client_sequence(seq);
  f->set_value(value);
  f->set_event_source_ns(event_ns);
  return m;
}

inline v1::AgentMessage StepMsg(uint64_t seq, uint64_t step_id, int64_t start_ns, int64_t end_ns,
                                const std::string& action) {
  v1::AgentMessage m;
  auto* s = m.mutable_step();
  s->set_client_sequence(seq);
  s->set_step_id(step_id);
  s->set_start_agent_ns(start_ns);
  s->set_end_agent_ns(end_ns);
  s->set_action(action);
  return m;
}

}  // namespace tickmark::testing

#endif  // TICKMARK_TESTS_RPC_TEST_SERVER_H_

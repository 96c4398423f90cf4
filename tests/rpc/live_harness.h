// The live service assembled by hand for tests that need what TickmarkServer
// hides: a fault-injecting ledger between the service and SQLite, the
// service's counters, and a hand-driven clock for rate limits and the hello
// timeout. On 127.0.0.1:0 in a temp folder.
#ifndef TICKMARK_TESTS_RPC_LIVE_HARNESS_H_
#define TICKMARK_TESTS_RPC_LIVE_HARNESS_H_

#include <grpcpp/grpcpp.h>

#include <chrono>
#include <memory>
#include <string>

#include "server/ledger/sqlite/sqlite_ledger.h"
#include "server/rpc/auth.h"
#include "server/rpc/live_service.h"
#include "server/rpc/session_hub.h"
#include "tests/rpc/fault_ledger.h"
#include "tests/rpc/test_server.h"

namespace tickmark::testing {

class LiveHarness {
 public:
  LiveHarness(const std::string& dir, rpc::LiveService::Options options) {
    ledger::SqliteLedger::Options lo;
    lo.path = dir + "/tickmark.db";
    auto opened = ledger::SqliteLedger::Open(lo);
    EXPECT_TRUE(opened.ok()) << opened.status().message();
    sqlite_ = std::move(*opened);
    fault_ = std::make_unique<FaultLedger>(sqlite_.get());
    hub_ = std::make_unique<rpc::SessionHub>(fault_.get(), &mono_, &rpc::SystemUtcNowNanos,
                                             rpc::SessionHub::Options{});
    auth_ = std::make_unique<rpc::TokenAuthority>(fault_.get());
    live_ = std::make_unique<rpc::LiveService>(hub_.get(), auth_.get(), &mono_, options);
    grpc::ServerBuilder builder;
    builder.AddListeningPort("127.0.0.1:0", grpc::InsecureServerCredentials(), &port_);
    builder.RegisterService(live_.get());
    server_ = builder.BuildAndStart();
    channel_ = grpc::CreateChannel("127.0.0.1:" + std::to_string(port_),
                                   grpc::InsecureChannelCredentials());
    stub_ = v1::Live::NewStub(channel_);
    auto session = hub_->Create("harness", "");
    EXPECT_TRUE(session.ok()) << session.status().message();
    session_ = (*session)->id();
  }
  ~LiveHarness() { Shutdown(); }

  // Stops the server (cancelling open streams), the service and the ledger.
  void Shutdown() {
    if (down_) return;
    down_ = true;
    server_->Shutdown(std::chrono::system_clock::now() + std::chrono::milliseconds(200));
    live_->Stop();
    fault_->Clear();
    fault_->Flush().IgnoreError();
    sqlite_->Close();
  }

  std::string Token(v1::Role role, const std::string& subject) {
    auto issued = auth_->Issue(session_, role, subject, rpc::SystemUtcNowNanos());
    EXPECT_TRUE(issued.ok()) << issued.status().message();
    return issued.ok() ? issued->second : "";
  }

  std::unique_ptr<TrainerStream> Trainer(const std::string& metadata_token = "") {
    auto ctx = std::make_unique<grpc::ClientContext>();
    ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(20));
    if (!metadata_token.empty()) ctx->AddMetadata("authorization", "Bearer " + metadata_token);
    auto rw = stub_->Train(ctx.get());
    return std::make_unique<TrainerStream>(std::move(ctx), std::move(rw), 0);
  }

  rpc::LiveService& live() { return *live_; }
  FaultLedger& fault() { return *fault_; }
  const std::string& session() const { return session_; }
  std::shared_ptr<grpc::Channel> channel() { return channel_; }
  v1::Live::Stub& stub() { return *stub_; }

 private:
  SystemMonotonic mono_;
  std::unique_ptr<ledger::SqliteLedger> sqlite_;
  std::unique_ptr<FaultLedger> fault_;
  std::unique_ptr<rpc::SessionHub> hub_;
  std::unique_ptr<rpc::TokenAuthority> auth_;
  std::unique_ptr<rpc::LiveService> live_;
  std::unique_ptr<grpc::Server> server_;
  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<v1::Live::Stub> stub_;
  int port_ = 0;
  std::string session_;
  bool down_ = false;
};

// Waits (polling, with a deadline) until `done()` holds.
template <typename F>
bool WaitFor(F done, std::chrono::milliseconds deadline = std::chrono::milliseconds(10000)) {
  const auto until = std::chrono::steady_clock::now() + deadline;
  while (!done()) {
    if (std::chrono::steady_clock::now() > until) return false;
    std::this_thread::sleep_for(std::chrono::milliseconds(2));
  }
  return true;
}

}  // namespace tickmark::testing

#endif  // TICKMARK_TESTS_RPC_LIVE_HARNESS_H_

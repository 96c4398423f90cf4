// For the benches that measure tickmarkd over gRPC (connections_bench,
// fanout_bench, flood_bench, ingest_bench): one in-process server on
// loopback over a ledger in a temporary folder of its own, its operator
// token, a channel and an admin stub, and a session with one token; and a
// bare gRPC server for their transport-only baselines.
#ifndef TICKMARK_BENCH_BENCH_SERVER_H_
#define TICKMARK_BENCH_BENCH_SERVER_H_

#include <grpcpp/generic/async_generic_service.h>
#include <grpcpp/grpcpp.h>
#include <stdlib.h>

#include <cstdio>
#include <filesystem>
#include <fstream>
#include <memory>
#include <string>
#include <system_error>

#include "server/rpc/server.h"
#include "tests/e2e/live_stream.h"

namespace tickmark::bench {

class BenchServer {
 public:
  // Server options with the per-stream and per-token rate limits off: a
  // bench measures the server's own capacity (the defaults are for humans).
  static rpc::ServerOptions WithoutRateLimits() {
    rpc::ServerOptions options;
    options.live.feedback_rate = 0;
    options.live.step_rate = 0;
    return options;
  }

  // Starts tickmarkd with `options`, listening on 127.0.0.1 (any port) with
  // its data in a new temporary folder (both set here). nullptr, with the
  // reason on stderr after `who` (the bench's name), when it does not start.
  static std::unique_ptr<BenchServer> Start(const char* who, rpc::ServerOptions options) {
    std::unique_ptr<BenchServer> out(new BenchServer(who));
    std::string tmpl = (std::filesystem::temp_directory_path() / "tickmark-bench-XXXXXX").string();
    if (mkdtemp(tmpl.data()) == nullptr) {
      std::fprintf(stderr, "%s: cannot make a temporary folder\n", who);
      return nullptr;
    }
    out->dir_ = tmpl;
    options.listen = "127.0.0.1:0";
    options.data_dir = out->dir_;
    auto server = rpc::TickmarkServer::Start(options);
    if (!server.ok()) {
      std::fprintf(stderr, "%s: %s\n", who, std::string(server.status().message()).c_str());
      return nullptr;
    }
    out->server_ = std::move(*server);
    out->target_ = "127.0.0.1:" + std::to_string(out->server_->port());
    std::getline(std::ifstream(out->server_->operator_token_path()), out->operator_token_);
    out->channel_ = grpc::CreateChannel(out->target_, grpc::InsecureChannelCredentials());
    out->admin_ = v1::SessionAdmin::NewStub(out->channel_);
    return out;
  }

  ~BenchServer() {
    if (server_) server_->Shutdown(Duration::Seconds(2));
    std::error_code ec;
    if (!dir_.empty()) std::filesystem::remove_all(dir_, ec);
  }
  BenchServer(const BenchServer&) = delete;
  BenchServer& operator=(const BenchServer&) = delete;

  const std::string& target() const { return target_; }  // "127.0.0.1:PORT"
  const std::string& operator_token() const { return operator_token_; }
  const std::shared_ptr<grpc::Channel>& channel() const { return channel_; }
  v1::SessionAdmin::Stub* admin() const { return admin_.get(); }

  // A new session titled `title` and one token of `role` for `subject` in
  // it; false, with the reason on stderr, when either call fails.
  bool CreateSession(const std::string& title, v1::Role role, const std::string& subject,
                     e2e::SessionWithToken* out) const {
    grpc::Status s =
        e2e::CreateSessionWithToken(admin_.get(), operator_token_, title, role, subject, out);
    if (!s.ok()) std::fprintf(stderr, "%s: %s\n", who_, s.error_message().c_str());
    return s.ok();
  }

 private:
  explicit BenchServer(const char* who) : who_(who) {}

  const char* who_;
  std::string dir_;
  std::unique_ptr<rpc::TickmarkServer> server_;
  std::string target_;
  std::string operator_token_;
  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<v1::SessionAdmin::Stub> admin_;
};

// A bare gRPC server on 127.0.0.1 (any port, written to *port) for a
// generic callback service: the benches' transport-only baselines, with
// nothing of tickmark in them. nullptr when it does not start.
inline std::unique_ptr<grpc::Server> StartBareServer(grpc::CallbackGenericService* service,
                                                     int* port) {
  grpc::ServerBuilder builder;
  builder.AddListeningPort("127.0.0.1:0", grpc::InsecureServerCredentials(), port);
  builder.RegisterCallbackGenericService(service);
  return builder.BuildAndStart();
}

}  // namespace tickmark::bench

#endif  // TICKMARK_BENCH_BENCH_SERVER_H_

#include "server/rpc/server.h"

#include <sys/stat.h>

#include <chrono>
#include <filesystem>
#include <fstream>

#include <grpcpp/security/server_credentials.h>
#include <grpcpp/server_builder.h>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/ledger/sqlite/sqlite_ledger.h"
#include "server/net/udp_probe_server.h"

namespace tickmark::rpc {
namespace {

absl::StatusOr<std::string> ReadFile(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return absl::NotFoundError(Cat("cannot read ", path));
  return std::string(std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>());
}

// The operator token: created once, kept (hashed) in the ledger and (in the
// clear) in a file only the server's user can read.
absl::Status EnsureOperatorToken(TokenAuthority* auth, const std::string& path,
                                 int64_t now_ns) {
  if (std::filesystem::exists(path)) {
    auto secret = ReadFile(path);
    if (!secret.ok()) return secret.status();
    std::string s = *secret;
    while (!s.empty() && (s.back() == '\n' || s.back() == ' ')) s.pop_back();
    auto who = auth->Authenticate(s);
    if (who.ok() && who->operator_token()) return absl::OkStatus();
    TM_LOG(kWarning) << path << " does not hold a valid operator token for this ledger; "
                     << "issuing a new one";
  }
  auto issued = auth->Issue("", tickmark::v1::ROLE_ADMIN, "operator", now_ns);
  if (!issued.ok()) return issued.status();
  const std::string tmp = path + ".tmp";
  {
    std::ofstream out(tmp, std::ios::trunc);
    out << issued->second << "\n";
    if (!out) return absl::UnavailableError(Cat("cannot write ", tmp));
  }
  ::chmod(tmp.c_str(), 0600);
  std::filesystem::rename(tmp, path);
  TM_LOG(kInfo) << "operator token written to " << path << " (mode 0600)";
  return absl::OkStatus();
}

}  // namespace

std::string ListenHost(const std::string& host_port) {
  std::string host = host_port;
  if (!host.empty() && host.front() == '[') {
    host = host.substr(1, host.find(']') - 1);
  } else if (auto colon = host.rfind(':'); colon != std::string::npos) {
    host = host.substr(0, colon);
  }
  return host;
}

bool IsLoopbackAddress(const std::string& host_port) {
  const std::string host = ListenHost(host_port);
  return host == "localhost" || host == "::1" || host.rfind("127.", 0) == 0;
}

absl::StatusOr<std::unique_ptr<TickmarkServer>> TickmarkServer::Start(
    const ServerOptions& options) {
  std::unique_ptr<TickmarkServer> s(new TickmarkServer());
  if (options.data_dir.empty() && options.ledger_path.empty()) {
    return absl::InvalidArgumentError("give --data-dir (or --ledger)");
  }
  if (!options.data_dir.empty()) {
    std::error_code ec;
    std::filesystem::create_directories(options.data_dir, ec);
    if (ec) return absl::UnavailableError(Cat("cannot create ", options.data_dir, ": ", ec.message()));
  }
  s->ledger_path_ = options.ledger_path.empty() ? options.data_dir + "/tickmark.db"
                                                : options.ledger_path;
  std::filesystem::path ledger_dir = std::filesystem::path(s->ledger_path_).parent_path();
  s->operator_token_path_ =
      (options.data_dir.empty() ? ledger_dir.string() : options.data_dir) + "/operator.token";
  if (s->operator_token_path_.front() == '/' && ledger_dir.empty()) {
    s->operator_token_path_ = "operator.token";
  }

  const bool tls = !options.tls_cert_file.empty() || !options.tls_key_file.empty();
  if (!tls && !IsLoopbackAddress(options.listen) && !options.allow_insecure_remote) {
    return absl::InvalidArgumentError(
        Cat("refusing plaintext on ", options.listen,
            ": give --tls-cert and --tls-key, or --allow-insecure-remote on a trusted network"));
  }
  std::shared_ptr<grpc::ServerCredentials> creds;
  if (tls) {
    auto cert = ReadFile(options.tls_cert_file);
    auto key = ReadFile(options.tls_key_file);
    if (!cert.ok()) return cert.status();
    if (!key.ok()) return key.status();
    grpc::SslServerCredentialsOptions ssl;
    ssl.pem_key_cert_pairs.push_back({*key, *cert});
    creds = grpc::SslServerCredentials(ssl);
  } else {
    creds = grpc::InsecureServerCredentials();
  }

  ledger::SqliteLedger::Options lo;
  lo.path = s->ledger_path_;
  lo.synchronous_full = options.durable_power_loss;
  lo.allow_new_ledger = options.new_ledger;
  lo.accept_lost_records = options.accept_lost_records;
  lo.reserve_bytes = options.ledger_reserve_bytes;
  lo.evidence_files = {s->operator_token_path_};
  auto ledger = ledger::SqliteLedger::Open(lo);
  if (!ledger.ok()) return ledger.status();
  s->ledger_ = std::move(*ledger);
  s->hub_ = std::make_unique<SessionHub>(s->ledger_.get(), &s->mono_, &SystemUtcNowNanos,
                                         options.sessions);
  s->auth_ = std::make_unique<TokenAuthority>(s->ledger_.get());
  if (absl::Status st = EnsureOperatorToken(s->auth_.get(), s->operator_token_path_,
                                            SystemUtcNowNanos());
      !st.ok()) {
    return st;
  }
  s->admin_ = std::make_unique<AdminService>(s->hub_.get(), s->auth_.get());
  LiveService::Options live = options.live;
  if (options.udp_probe) {
    auto udp = net::UdpProbeServer::Start(ListenHost(options.listen), options.udp_probe_port);
    if (!udp.ok()) {
      s->shut_down_ = true;  // nothing is serving yet; Shutdown() has nothing to stop
      return udp.status();
    }
    s->udp_ = std::move(*udp);
    net::UdpProbeTable* table = &s->udp_->table();
    live.probe_port.port = s->udp_->port();
    live.probe_port.add_stream =
        [table](uint64_t tag, std::string key, std::function<SessionTime()> now,
                std::function<void(uint64_t, const ProbeTimestamps&)> on_sample) {
          table->Add(tag,
                     net::UdpProbeStream{std::move(key), std::move(now), std::move(on_sample)});
        };
    live.probe_port.remove_stream = [table](uint64_t tag) { table->Remove(tag); };
    TM_LOG(kInfo) << "UDP probe port " << s->udp_->port();
  }
  s->live_ = std::make_unique<LiveService>(s->hub_.get(), s->auth_.get(), &s->mono_, live);

  grpc::ServerBuilder builder;
  builder.AddListeningPort(options.listen, creds, &s->port_);
  builder.RegisterService(s->admin_.get());
  builder.RegisterService(s->live_.get());
  // Long-lived streams from trainers on flaky links: allow client keepalive
  // pings every 20 s without data (gRPC's default would GOAWAY them).
  builder.AddChannelArgument(GRPC_ARG_HTTP2_MIN_RECV_PING_INTERVAL_WITHOUT_DATA_MS, 20000);
  builder.AddChannelArgument(GRPC_ARG_HTTP2_MAX_PING_STRIKES, 0);
  s->server_ = builder.BuildAndStart();
  if (!s->server_ || s->port_ == 0) {
    return absl::UnavailableError(Cat("cannot listen on ", options.listen));
  }
  return s;
}

void TickmarkServer::Shutdown(Duration grace) {
  if (shut_down_) return;
  shut_down_ = true;
  // Stop accepting; give open calls `grace`, then cancel them. Every
  // acknowledged record is already committed; what is in flight commits on
  // Close below.
  // Start() may have failed part way: stop only what was built.
  if (server_) {
    server_->Shutdown(std::chrono::system_clock::now() +
                      std::chrono::nanoseconds(grace.nanos()));
  }
  if (live_) live_->Stop();
  // After the streams: their last UDP samples still found the port.
  if (udp_) udp_->Stop();
  if (ledger_) {
    if (absl::Status st = ledger_->Flush(); !st.ok()) {
      TM_LOG(kError) << "ledger flush at shutdown: " << st.message();
    }
    ledger_->Close();
  }
}

void TickmarkServer::Wait() { server_->Wait(); }

int TickmarkServer::udp_probe_port() const { return udp_ ? udp_->port() : 0; }

TickmarkServer::~TickmarkServer() { Shutdown(Duration::Zero()); }

}  // namespace tickmark::rpc

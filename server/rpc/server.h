// The tickmarkd server assembled: ledger, sessions, token authority, the
// gRPC services, and the operator token. main() only parses flags and calls
// this (docs/conventions.md: the binary is wiring only).
//
// Health: the standard gRPC health service is on; a watcher thread reads
// Ledger::WriteHealth() every ServerOptions::health_interval and reports
// NOT_SERVING while ledger writes fail, SERVING again once they succeed;
// the same state goes to the metrics (tickmark_ledger_writable, _disk_full;
// docs/operations.md). gRPC server reflection is on as well.
//
// Thread safety: Start/Shutdown from one thread; the rest is internal.
#ifndef TICKMARK_SERVER_RPC_SERVER_H_
#define TICKMARK_SERVER_RPC_SERVER_H_

#include <grpcpp/server.h>

#include <condition_variable>
#include <memory>
#include <mutex>
#include <string>
#include <thread>

#include "server/ledger/ledger.h"
#include "server/rpc/admin_service.h"
#include "server/rpc/invite_issuer.h"
#include "server/rpc/live_service.h"

namespace tickmark::net {
class UdpProbeServer;
}

namespace tickmark::rpc {

struct ServerOptions {
  std::string listen = "127.0.0.1:7461";  // host:port; port 0 picks a free one
  std::string data_dir;                   // holds tickmark.db and operator.token
  std::string ledger_path;                // default: data_dir/tickmark.db
  // With a postgresql:// ledger (several instances may share it): where
  // clients reach this instance directly (default: listen), this
  // instance's id in the lease table (default: host:pid:random), and how
  // long a session's lease lasts without renewal (the takeover delay after
  // a crash).
  std::string advertise;
  std::string instance_id;
  Duration lease = Duration::Seconds(5);
  bool durable_power_loss = false;        // SQLite synchronous=FULL
  // Start a new, empty ledger although the data folder shows one existed
  // (operator.token, tickmark.db.heads); see SqliteLedger::Options.
  bool new_ledger = false;
  // Start although the ledger lacks records its side file says were
  // committed (the loss is logged and noted in the ledger).
  bool accept_lost_records = false;
  // Size of the ledger's reserve file (freed when the disk is full).
  uint64_t ledger_reserve_bytes = 4 << 20;
  // WAL sizes (pages) at which the SQLite ledger's writer restarts the WAL
  // and checkpoints inline (SqliteLedger::Options); 0 keeps the defaults.
  // Benches set them to measure the commit path without its one stall.
  int wal_restart_pages = 0;
  int wal_backstop_pages = 0;
  // TLS: both set, or neither (then plaintext, allowed only on loopback
  // unless allow_insecure_remote).
  std::string tls_cert_file;
  std::string tls_key_file;
  bool allow_insecure_remote = false;
  // The UDP probe port (DEVELOPERS.md, "UDP probe port"): off unless
  // udp_probe; bound on the gRPC listen host, udp_probe_port 0 picks a free
  // port. Its hooks in live.probe_port are filled in by Start().
  bool udp_probe = false;
  uint16_t udp_probe_port = 0;
  // Never map event times through real time, even when this host's and a
  // client's clocks are disciplined (docs/time-model.md, "Disciplined
  // clocks"); clears live.realtime_mapping in Start().
  bool no_realtime_mapping = false;
  LiveService::Options live;
  SessionHub::Options sessions;
  // How often the ledger's write health is read for the gRPC health
  // service (grpc.health.v1.Health: NOT_SERVING while writes fail).
  Duration health_interval = Duration::Seconds(1);
  // Makes SessionAdmin.CreateInvite's join codes: the web bridge
  // (server/web), when tickmarkd runs one; null: CreateInvite is refused.
  // Not owned; must outlive the server.
  InviteIssuer* invites = nullptr;
};

class TickmarkServer {
 public:
  // Opens the ledger, creates the operator token file if missing, binds.
  static absl::StatusOr<std::unique_ptr<TickmarkServer>> Start(const ServerOptions& options);
  // The same on a ledger opened by the caller (tests wrap one to inject
  // faults); options.ledger_path then only names it in messages.
  static absl::StatusOr<std::unique_ptr<TickmarkServer>> Start(
      const ServerOptions& options, std::unique_ptr<ledger::Ledger> ledger);
  ~TickmarkServer();

  // The bound port (useful with port 0).
  int port() const { return port_; }
  // The bound UDP probe port; 0 when off.
  int udp_probe_port() const;
  const std::string& operator_token_path() const { return operator_token_path_; }
  const std::string& ledger_path() const { return ledger_path_; }
  // Stops accepting, ends streams (giving them `grace` to finish), commits
  // the ledger and closes it. Idempotent.
  void Shutdown(Duration grace = Duration::Seconds(5));
  void Wait();

  // For parts tickmarkd wires in beside the gRPC services (the web bridge,
  // server/web): valid from Start() until the server is destroyed. The
  // bridge reaches the services through grpc_server()->InProcessChannel().
  grpc::Server* grpc_server() const { return server_.get(); }
  SessionHub* hub() const { return hub_.get(); }
  TokenAuthority* auth() const { return auth_.get(); }
  const MonotonicSource* mono() const { return &mono_; }

 private:
  TickmarkServer() = default;
  // The health watcher thread: reads Ledger::WriteHealth() every
  // health_interval_ and flips the gRPC health status on a change.
  void WatchLedgerHealth();
  void StopHealthWatcher();

  std::unique_ptr<ledger::Ledger> ledger_;
  SystemMonotonic mono_;
  std::unique_ptr<SessionHub> hub_;
  std::unique_ptr<TokenAuthority> auth_;
  std::unique_ptr<AdminService> admin_;
  std::unique_ptr<net::UdpProbeServer> udp_;  // the UDP probe port, if on
  std::unique_ptr<LiveService> live_;
  std::unique_ptr<grpc::Server> server_;
  int port_ = 0;
  std::string operator_token_path_;
  std::string ledger_path_;
  bool shut_down_ = false;

  Duration health_interval_;
  std::thread health_thread_;
  std::mutex health_mu_;
  std::condition_variable health_cv_;
  bool health_stop_ = false;  // GUARDED_BY(health_mu_)
};

// Checks a TLS pair before the server uses it: both files or neither, each
// readable, each parses as PEM (certificate; unencrypted private key), and
// the key belongs to the (first) certificate. Every error names the file.
// On success fills *cert_pem and *key_pem with the files' contents.
absl::Status CheckTlsPair(const std::string& cert_file, const std::string& key_file,
                          std::string* cert_pem, std::string* key_pem);

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_SERVER_H_

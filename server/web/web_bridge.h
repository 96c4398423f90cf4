// The web port of tickmarkd (docs/web.md; docs/architecture.md, "The web
// bridge"): the trainer page, the live view and the join call, served by a
// bridge that reaches the server's own gRPC services through an in-process
// channel. tickmarkd wires it in: construct it before TickmarkServer::Start
// (it is the server's InviteIssuer, ServerOptions::invites), Start it with
// the running server, Stop it before the server shuts down.
//
// Joining: SessionAdmin.CreateInvite (`tickmark invite`) makes a single-use
// code (JoinCodeStore, in memory); the page posts it to /api/join and gets
// a fresh token of the invite's role, issued like `tickmark token issue`.
//
// Thread safety: CreateInvite may be called from any thread at any time
// (before Start it refuses); Start and Stop from one thread.
#ifndef TICKMARK_SERVER_WEB_WEB_BRIDGE_H_
#define TICKMARK_SERVER_WEB_WEB_BRIDGE_H_

#include <atomic>
#include <memory>
#include <string>

#include "server/rpc/invite_issuer.h"
#include "server/rpc/server.h"
#include "server/web/http_router.h"
#include "server/web/http_server.h"
#include "server/web/join_codes.h"
#include "server/web/relay.h"

namespace tickmark::web {

struct WebOptions {
  // HOST:PORT of the web port; empty: no web port.
  std::string http_listen;
  // The address invite links start with, as trainers' browsers reach the
  // server ("https://lab.example.org:8443"); empty: made from http_listen
  // (a wildcard host becomes this machine's name).
  std::string http_public_url;
  // The server's TLS pair (tickmarkd's --tls-cert/--tls-key); without it
  // the web port is plaintext, allowed on loopback or with
  // allow_insecure_remote only.
  std::string tls_cert_file;
  std::string tls_key_file;
  bool allow_insecure_remote = false;
  // Invites last this long unless the request says otherwise.
  Duration invite_ttl = Duration::Seconds(15 * 60);
  HttpServer::Options http;
  JoinCodeStore::Options codes;
  // The largest |value| a graded button may send (the live service's
  // Limits::max_abs_value).
  double max_abs_value = 1000;
  // Serve GET /metrics (ops::Registry::Default(), docs/operations.md) on
  // the web port.
  bool http_metrics = true;
};

class WebBridge final : public rpc::InviteIssuer {
 public:
  explicit WebBridge(WebOptions options);
  ~WebBridge() override;

  bool enabled() const { return !options_.http_listen.empty(); }

  // Checks the TLS pair and the plaintext rule, binds, and starts serving.
  absl::Status Start(rpc::TickmarkServer* server);
  // Cancels the pages' streams (waiting up to `grace` for them to end), then
  // stops the sockets. Idempotent.
  void Stop(Duration grace = Duration::Seconds(5));

  int port() const { return http_ ? http_->port() : 0; }
  // The address invite links start with ("http://127.0.0.1:8080").
  const std::string& base_url() const { return base_url_; }

  absl::StatusOr<tickmark::v1::CreateInviteResponse> CreateInvite(
      const tickmark::v1::CreateInviteRequest& request) override;

  // What /api/join does with a code (public for tests).
  absl::StatusOr<JoinGrant> Join(const std::string& code, const std::string& peer);

 private:
  const WebOptions options_;
  const absl::StatusOr<std::string> public_origin_;  // from http_public_url
  JoinCodeStore codes_;
  HttpRouter router_;
  RelayContext relays_;
  rpc::TickmarkServer* server_ = nullptr;  // not owned; set by Start
  std::atomic<bool> started_{false};
  std::string base_url_;
  std::unique_ptr<HttpServer> http_;
};

// The origin part of a public URL ("https://lab.example.org:8443" from
// "https://lab.example.org:8443/"), or INVALID_ARGUMENT naming the flag if
// it is not http(s)://HOST[:PORT] with no path: the pages live at the root.
absl::StatusOr<std::string> PublicOrigin(const std::string& public_url);

// The base URL for invite links: `public_url` without a trailing slash if
// given, else SCHEME://HOST:PORT from the listen host (a wildcard host, 0.0.0.0
// or ::, becomes `hostname`; an IPv6 literal gets brackets).
std::string InviteBaseUrl(const std::string& public_url, const std::string& listen_host, int port,
                          bool tls, const std::string& hostname);

}  // namespace tickmark::web

#endif  // TICKMARK_SERVER_WEB_WEB_BRIDGE_H_

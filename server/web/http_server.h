// The web port's sockets (Boost.Beast over Boost.Asio): HTTP/1.1 requests
// go to the HttpRouter; WebSocket upgrades on kTrainSocketPath and
// kLiveSocketPath become a relay (relay.h) between the page and the server's
// gRPC services. TLS (Boost.Asio SSL, OpenSSL) with the server's certificate
// when a key pair is given; the caller decides whether plaintext is allowed.
//
// Bounds: connections in total and per client address; request headers
// 8 KiB and bodies kMaxRequestBody; page messages kMaxPageMessageBytes; the
// queue of messages to one page max_queued_bytes (past it the page is
// dropped, never waited for); a request must arrive within 30 s, a TLS
// handshake within 10 s, and an idle WebSocket is pinged and closed if the
// page stays silent for socket_idle_timeout.
//
// Thread safety: Start and Stop from one thread. The sockets run on
// `threads` threads of their own, each connection on its own strand.
#ifndef TICKMARK_SERVER_WEB_HTTP_SERVER_H_
#define TICKMARK_SERVER_WEB_HTTP_SERVER_H_

#include <functional>
#include <memory>
#include <string>

#include "absl/status/statusor.h"
#include "server/core/time.h"
#include "server/web/http_router.h"
#include "server/web/relay.h"

namespace tickmark::web {

class HttpServer {
 public:
  struct Options {
    std::string listen = "127.0.0.1:0";  // HOST:PORT; port 0 picks a free one
    std::string cert_pem;                // both PEMs, or neither (plaintext)
    std::string key_pem;
    int threads = 2;
    size_t max_connections = 1024;
    size_t max_connections_per_peer = 64;
    size_t max_queued_bytes = 8 << 20;  // to one page
    Duration socket_idle_timeout = Duration::Seconds(20);
  };
  // Makes the relay for a WebSocket on `path` (kTrainSocketPath or
  // kLiveSocketPath); `request` is the upgrade request.
  using RelayFactory = std::function<std::shared_ptr<Relay>(
      const std::string& path, std::shared_ptr<PageSocket> page, const HttpRequest& request)>;

  // Binds and starts serving. The router and factory must outlive Stop().
  static absl::StatusOr<std::unique_ptr<HttpServer>> Start(const Options& options,
                                                           const HttpRouter* router,
                                                           RelayFactory relays);
  ~HttpServer();

  int port() const { return port_; }
  bool tls() const;
  // Stops accepting and tells every relay its page is gone, so their gRPC
  // calls are cancelled; the sockets keep running to tell the pages why.
  void CancelRelays();
  // CancelRelays(), then stops the sockets and joins the threads. Call once
  // the relays' calls are done (CallTracker::WaitIdle): no gRPC thread may
  // post to a socket after this. Idempotent.
  void Stop();

  struct Impl;

 private:
  HttpServer() = default;
  std::shared_ptr<Impl> impl_;
  int port_ = 0;
};

}  // namespace tickmark::web

#endif  // TICKMARK_SERVER_WEB_HTTP_SERVER_H_

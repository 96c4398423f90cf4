// A plain HTTP/1.1 port that answers GET /metrics with a registry's text
// exposition and nothing else (404 elsewhere, 405 for other methods), for
// servers that run no web port (tickmarkd --metrics-listen). Boost.Beast on
// one thread of its own; each connection is read with a 10 s deadline,
// answered once and closed; at most kMaxConnections at a time.
//
// Plaintext only: the caller decides whether the address is allowed
// (tickmarkd allows loopback, or any address with --allow-insecure-remote).
//
// Thread safety: Start and Stop from one thread.
#ifndef TICKMARK_SERVER_OPS_METRICS_HTTP_SERVER_H_
#define TICKMARK_SERVER_OPS_METRICS_HTTP_SERVER_H_

#include <functional>
#include <memory>
#include <string>

#include "absl/status/statusor.h"

namespace tickmark::ops {

class MetricsHttpServer {
 public:
  static constexpr size_t kMaxConnections = 64;

  // Binds "IP:PORT" (port 0 picks a free one; "localhost" means
  // 127.0.0.1) and serves `render()` (called on the server's thread; must be
  // thread-safe) at /metrics.
  static absl::StatusOr<std::unique_ptr<MetricsHttpServer>> Start(
      const std::string& listen, std::function<std::string()> render);
  ~MetricsHttpServer();

  int port() const { return port_; }
  // Closes the port and the open connections, joins the thread. Idempotent.
  void Stop();

  struct Impl;

 private:
  MetricsHttpServer() = default;
  std::unique_ptr<Impl> impl_;
  int port_ = 0;
};

}  // namespace tickmark::ops

#endif  // TICKMARK_SERVER_OPS_METRICS_HTTP_SERVER_H_

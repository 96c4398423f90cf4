// What the web port answers to each HTTP request, without any I/O, so that
// routing, the join call and the security headers are tested by feeding
// requests (docs/conventions.md habit 4). HttpServer (http_server.h) reads
// requests off the sockets, hands WebSocket upgrades on kTrainSocketPath and
// kLiveSocketPath to the bridges and everything else to Route().
//
// Routes:
//   GET  /            the join page (reads the code from the URL fragment)
//   GET  /join        the same page
//   GET  /trainer     the trainer page
//   GET  /live        the live view
//   GET  /assets/F    a file of server/web/assets/ (css, js, svg)
//   POST /api/join    {"code": "..."} -> the token and what the page needs
//   GET  /metrics     Prometheus text format (docs/operations.md), when
//                     ServeMetrics() was called
// HEAD works wherever GET does. Every answer carries the security headers
// (SecurityHeaders()).
//
// Thread safety: Route() may be called from any thread; the join function
// must be thread-safe.
#ifndef TICKMARK_SERVER_WEB_HTTP_ROUTER_H_
#define TICKMARK_SERVER_WEB_HTTP_ROUTER_H_

#include <functional>
#include <string>
#include <utility>
#include <vector>

#include "absl/status/statusor.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::web {

inline constexpr char kTrainSocketPath[] = "/ws/train";
inline constexpr char kLiveSocketPath[] = "/ws/live";
// Largest request body read (the join call is a few dozen bytes).
inline constexpr size_t kMaxRequestBody = 4096;

struct HttpRequest {
  std::string method;  // "GET"
  std::string target;  // "/assets/style.css?v=1"
  std::string body;
  std::string content_type;   // the Content-Type header, if any
  std::string if_none_match;  // the If-None-Match header, if any
  std::string origin;         // the Origin header, if any
  std::string host;           // the Host header
  std::string user_agent;     // the User-Agent header
  std::string peer;           // the client's address, for rate limits
  bool tls = false;           // arrived over TLS
};

struct HttpResponse {
  int status = 200;
  std::vector<std::pair<std::string, std::string>> headers;
  std::string body;
  // The value of header `name` (case-sensitive as stored), or "".
  std::string Header(const std::string& name) const;
};

// A join code traded for a token (JoinCodeStore + TokenAuthority).
struct JoinGrant {
  std::string token;  // the secret
  std::string session_id;
  std::string session_title;
  tickmark::v1::Role role = tickmark::v1::ROLE_UNSPECIFIED;
  std::string subject;
  std::vector<double> graded_values;
};
using JoinFunction =
    std::function<absl::StatusOr<JoinGrant>(const std::string& code, const std::string& peer)>;

// The headers every answer carries: a Content-Security-Policy that allows
// only the server's own scripts, styles and sockets (no inline script, no
// framing), nosniff, no referrer, no framing, same-origin isolation, and
// HSTS when served over TLS.
std::vector<std::pair<std::string, std::string>> SecurityHeaders(bool tls);

// The path part of a target, without query or fragment.
std::string PathOf(const std::string& target);

// Whether a browser request's Origin (if it sent one) names this server, as
// reached through `host` (the Host header); the WebSocket upgrade and the
// join call refuse others (cross-site requests).
bool SameOrigin(const std::string& origin, const std::string& host, bool tls);

class HttpRouter {
 public:
  // `public_origin` ("https://lab.example.org:8443"; may be empty) is also
  // accepted as a request's Origin: the address browsers use when a proxy
  // in front terminates TLS or renames the host.
  explicit HttpRouter(JoinFunction join, std::string public_origin = "")
      : join_(std::move(join)), public_origin_(std::move(public_origin)) {}
  HttpResponse Route(const HttpRequest& request) const;
  // Answers GET /metrics with render() (text format 0.0.4); call before
  // serving. render must be thread-safe.
  void ServeMetrics(std::function<std::string()> render) { metrics_ = std::move(render); }
  // Whether a request's Origin is this server's own page: SameOrigin, or
  // the public origin.
  bool OriginAllowed(const HttpRequest& request) const;

 private:
  HttpResponse Join(const HttpRequest& request) const;
  JoinFunction join_;
  std::string public_origin_;
  std::function<std::string()> metrics_;  // empty: no /metrics
};

}  // namespace tickmark::web

#endif  // TICKMARK_SERVER_WEB_HTTP_ROUTER_H_

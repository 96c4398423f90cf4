#include "server/web/http_router.h"

#include <google/protobuf/struct.pb.h>
#include <google/protobuf/util/json_util.h>

#include "server/ops/metrics.h"
#include "server/web/assets.h"

namespace tickmark::web {
namespace {

namespace pb = google::protobuf;

// The pages, by path.
const Asset* PageFor(const std::string& path) {
  if (path == "/" || path == "/join") return FindAsset("join.html");
  if (path == "/trainer") return FindAsset("trainer.html");
  if (path == "/live") return FindAsset("live.html");
  if (path.rfind("/assets/", 0) == 0) {
    const std::string name = path.substr(8);
    // Pages are served under their own paths only; names with a slash or
    // starting with a dot are nothing of ours.
    const bool page = name.size() > 5 && name.compare(name.size() - 5, 5, ".html") == 0;
    if (name.empty() || name.find('/') != std::string::npos || name[0] == '.' || page) {
      return nullptr;
    }
    return FindAsset(name);
  }
  return nullptr;
}

HttpResponse Text(int status, const std::string& text, bool tls) {
  HttpResponse r;
  r.status = status;
  r.headers = SecurityHeaders(tls);
  r.headers.emplace_back("Content-Type", "text/plain; charset=utf-8");
  r.headers.emplace_back("Cache-Control", "no-store");
  r.body = text + "\n";
  return r;
}

// 405 naming the methods a path takes (RFC 9110 §15.5.6: Allow is required).
HttpResponse NotAllowed(const std::string& allow, bool tls) {
  HttpResponse r = Text(405, "use " + allow, tls);
  r.headers.emplace_back("Allow", allow);
  return r;
}

bool IsGetOrHead(const HttpRequest& request) {
  return request.method == "GET" || request.method == "HEAD";
}

HttpResponse Json(int status, const pb::Struct& body, bool tls) {
  HttpResponse r;
  r.status = status;
  r.headers = SecurityHeaders(tls);
  r.headers.emplace_back("Content-Type", "application/json");
  r.headers.emplace_back("Cache-Control", "no-store");
  if (!pb::util::MessageToJsonString(body, &r.body).ok()) r.body = "{}";
  return r;
}

HttpResponse JsonError(int status, const std::string& code, const std::string& message, bool tls) {
  pb::Struct body;
  (*body.mutable_fields())["error"].set_string_value(message);
  (*body.mutable_fields())["code"].set_string_value(code);
  return Json(status, body, tls);
}

// The HTTP status that says to a browser what a join failure means.
int HttpStatusOf(absl::StatusCode code) {
  switch (code) {
    case absl::StatusCode::kInvalidArgument:
      return 400;
    case absl::StatusCode::kUnauthenticated:
    case absl::StatusCode::kPermissionDenied:
      return 403;
    case absl::StatusCode::kNotFound:
      return 404;
    case absl::StatusCode::kFailedPrecondition:
    case absl::StatusCode::kDeadlineExceeded:
      return 410;  // Gone: used, expired, or the session closed
    case absl::StatusCode::kResourceExhausted:
      return 429;
    case absl::StatusCode::kUnavailable:
      return 503;
    default:
      return 500;
  }
}

std::string CodeName(absl::StatusCode code) {
  switch (code) {
    case absl::StatusCode::kInvalidArgument:
      return "malformed";
    case absl::StatusCode::kNotFound:
      return "unknown";
    case absl::StatusCode::kFailedPrecondition:
      return "used";
    case absl::StatusCode::kDeadlineExceeded:
      return "expired";
    case absl::StatusCode::kResourceExhausted:
      return "rate_limited";
    default:
      return "error";
  }
}

std::string RoleWord(tickmark::v1::Role role) {
  switch (role) {
    case tickmark::v1::ROLE_TRAINER:
      return "trainer";
    case tickmark::v1::ROLE_OBSERVER:
      return "observer";
    case tickmark::v1::ROLE_ADMIN:
      return "admin";
    case tickmark::v1::ROLE_AGENT:
      return "agent";
    default:
      return "";
  }
}

}  // namespace

std::string HttpResponse::Header(const std::string& name) const {
  for (const auto& [k, v] : headers) {
    if (k == name) return v;
  }
  return "";
}

std::vector<std::pair<std::string, std::string>> SecurityHeaders(bool tls) {
  std::vector<std::pair<std::string, std::string>> h = {
      // Only our own files and our own WebSocket; nothing inline, no
      // plugins, no framing, no form posts elsewhere.
      {"Content-Security-Policy",
       "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
       "connect-src 'self'; base-uri 'none'; form-action 'self'; frame-ancestors 'none'"},
      {"X-Content-Type-Options", "nosniff"},
      {"X-Frame-Options", "DENY"},
      {"Referrer-Policy", "no-referrer"},
      {"Cross-Origin-Opener-Policy", "same-origin"},
      {"Cross-Origin-Resource-Policy", "same-origin"},
      {"Permissions-Policy", "camera=(), microphone=(), geolocation=(), payment=(), usb=()"},
  };
  if (tls) h.emplace_back("Strict-Transport-Security", "max-age=31536000");
  return h;
}

std::string PathOf(const std::string& target) {
  const size_t end = target.find_first_of("?#");
  return end == std::string::npos ? target : target.substr(0, end);
}

bool SameOrigin(const std::string& origin, const std::string& host, bool tls) {
  if (origin.empty()) return true;  // not a browser's cross-site request
  return origin == (tls ? "https://" : "http://") + host;
}

bool HttpRouter::OriginAllowed(const HttpRequest& request) const {
  return SameOrigin(request.origin, request.host, request.tls) ||
         (!public_origin_.empty() && request.origin == public_origin_);
}

HttpResponse HttpRouter::Route(const HttpRequest& request) const {
  const std::string path = PathOf(request.target);
  if (path == "/api/join") {
    if (request.method != "POST") return NotAllowed("POST", request.tls);
    return Join(request);
  }
  if (path == "/metrics" && metrics_) {
    if (!IsGetOrHead(request)) return NotAllowed("GET, HEAD", request.tls);
    HttpResponse r;
    r.headers = SecurityHeaders(request.tls);
    r.headers.emplace_back("Content-Type", ops::kContentType);
    r.headers.emplace_back("Cache-Control", "no-store");
    if (request.method == "GET") r.body = metrics_();
    return r;
  }
  const Asset* asset = PageFor(path);
  if (asset == nullptr) return Text(404, "not found", request.tls);
  if (!IsGetOrHead(request)) return NotAllowed("GET, HEAD", request.tls);
  HttpResponse r;
  r.headers = SecurityHeaders(request.tls);
  r.headers.emplace_back("Content-Type", std::string(asset->content_type));
  // Revalidated every time (cheap with the ETag): a new server version's
  // files are never mixed with an old one's.
  r.headers.emplace_back("Cache-Control", "no-cache");
  r.headers.emplace_back("ETag", std::string(asset->etag));
  if (!request.if_none_match.empty() && request.if_none_match == asset->etag) {
    r.status = 304;
    return r;
  }
  if (request.method == "GET") r.body = std::string(asset->body);
  return r;
}

HttpResponse HttpRouter::Join(const HttpRequest& request) const {
  if (!OriginAllowed(request)) {
    return JsonError(403, "origin", "join requests come from this server's own page", request.tls);
  }
  if (request.content_type.rfind("application/json", 0) != 0) {
    return JsonError(415, "malformed", "send the code as application/json", request.tls);
  }
  if (request.body.size() > kMaxRequestBody) {
    return JsonError(413, "malformed", "request too large", request.tls);
  }
  pb::Struct in;
  pb::util::JsonParseOptions options;
  if (!pb::util::JsonStringToMessage(request.body, &in, options).ok() ||
      in.fields().count("code") == 0 || !in.fields().at("code").has_string_value()) {
    return JsonError(400, "malformed", "send {\"code\": \"...\"}", request.tls);
  }
  auto grant = join_(in.fields().at("code").string_value(), request.peer);
  if (!grant.ok()) {
    HttpResponse r = JsonError(HttpStatusOf(grant.status().code()), CodeName(grant.status().code()),
                               std::string(grant.status().message()), request.tls);
    if (r.status == 429) r.headers.emplace_back("Retry-After", "60");
    return r;
  }
  pb::Struct out;
  auto& f = *out.mutable_fields();
  f["token"].set_string_value(grant->token);
  f["sessionId"].set_string_value(grant->session_id);
  f["sessionTitle"].set_string_value(grant->session_title);
  f["role"].set_string_value(RoleWord(grant->role));
  f["subject"].set_string_value(grant->subject);
  f["page"].set_string_value(grant->role == tickmark::v1::ROLE_TRAINER ? "/trainer" : "/live");
  auto* values = f["gradedValues"].mutable_list_value();
  for (double v : grant->graded_values) values->add_values()->set_number_value(v);
  return Json(200, out, request.tls);
}

}  // namespace tickmark::web

#include "server/web/web_bridge.h"

#include <unistd.h>

#include <cmath>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/net/address.h"
#include "server/ops/metrics.h"
#include "server/rpc/auth.h"

namespace tickmark::web {

namespace v1 = tickmark::v1;

std::string InviteBaseUrl(const std::string& public_url, const std::string& listen_host, int port,
                          bool tls, const std::string& hostname) {
  if (!public_url.empty()) {
    std::string url = public_url;
    while (!url.empty() && url.back() == '/') url.pop_back();
    return url;
  }
  std::string host = listen_host;
  if (host.empty() || host == "0.0.0.0" || host == "::" || host == "[::]") host = hostname;
  if (host.find(':') != std::string::npos) host = Cat("[", host, "]");
  return Cat(tls ? "https" : "http", "://", host, ":", port);
}

absl::StatusOr<std::string> PublicOrigin(const std::string& public_url) {
  if (public_url.empty()) return std::string();
  std::string url = public_url;
  while (!url.empty() && url.back() == '/') url.pop_back();
  const size_t scheme = url.find("://");
  const std::string rest = scheme == std::string::npos ? "" : url.substr(scheme + 3);
  const std::string s = scheme == std::string::npos ? "" : url.substr(0, scheme);
  if ((s != "http" && s != "https") || rest.empty() ||
      rest.find_first_of("/?#@ ") != std::string::npos) {
    return absl::InvalidArgumentError(
        Cat("--http-public-url ", public_url,
            " is not http(s)://HOST[:PORT] (the pages live at the root; no path)"));
  }
  return url;
}

WebBridge::WebBridge(WebOptions options)
    : options_(std::move(options)),
      public_origin_(PublicOrigin(options_.http_public_url)),
      codes_(SystemMonotonic::Get(), options_.codes),
      router_([this](const std::string& code, const std::string& peer) { return Join(code, peer); },
              public_origin_.ok() ? *public_origin_ : "") {
  if (options_.http_metrics) router_.ServeMetrics([] { return ops::Registry::Default().Render(); });
}

WebBridge::~WebBridge() { Stop(Duration::Zero()); }

absl::Status WebBridge::Start(rpc::TickmarkServer* server) {
  if (!enabled()) return absl::OkStatus();
  if (!public_origin_.ok()) return public_origin_.status();
  HttpServer::Options http = options_.http;
  http.listen = options_.http_listen;
  if (absl::Status s = rpc::CheckTlsPair(options_.tls_cert_file, options_.tls_key_file,
                                         &http.cert_pem, &http.key_pem);
      !s.ok()) {
    return s;
  }
  const bool tls = !http.cert_pem.empty();
  if (!tls && !net::IsLoopbackTarget(options_.http_listen) && !options_.allow_insecure_remote) {
    return absl::InvalidArgumentError(
        Cat("refusing plaintext HTTP on ", options_.http_listen,
            ": give --tls-cert and --tls-key, or --allow-insecure-remote on a trusted network"));
  }
  server_ = server;
  relays_.channel = server->grpc_server()->InProcessChannel(grpc::ChannelArguments());
  relays_.hub = server->hub();
  RelayContext relays = relays_;
  auto started =
      HttpServer::Start(http, &router_,
                        [relays](const std::string& path, std::shared_ptr<PageSocket> page,
                                 const HttpRequest& request) -> std::shared_ptr<Relay> {
                          if (path == kTrainSocketPath)
                            return MakeTrainRelay(relays, std::move(page), request.user_agent);
                          if (path == kLiveSocketPath)
                            return MakeLiveRelay(relays, std::move(page));
                          return nullptr;
                        });
  if (!started.ok()) return started.status();
  http_ = std::move(*started);
  char hostname[256] = {};
  if (gethostname(hostname, sizeof(hostname) - 1) != 0) hostname[0] = '\0';
  base_url_ = InviteBaseUrl(options_.http_public_url, net::HostOf(options_.http_listen),
                            http_->port(), tls, hostname[0] ? hostname : "localhost");
  started_ = true;
  TM_LOG(kInfo) << "web port " << http_->port() << (tls ? " (TLS)" : " (plaintext)")
                << "; invite links start " << base_url_;
  return absl::OkStatus();
}

void WebBridge::Stop(Duration grace) {
  if (!http_) return;
  started_ = false;
  http_->CancelRelays();
  if (!relays_.calls->WaitIdle(grace)) {
    TM_LOG(kWarning) << "web: " << relays_.calls->open()
                     << " page streams still open after the grace period";
  }
  http_->Stop();
  // Only once no call is open may the sockets go: a gRPC thread could
  // still post to one. If some are left, keep the sockets' memory (the
  // process is ending anyway).
  if (relays_.calls->open() == 0) {
    http_.reset();
  } else {
    (void)http_.release();
  }
}

absl::StatusOr<v1::CreateInviteResponse> WebBridge::CreateInvite(
    const v1::CreateInviteRequest& request) {
  if (!started_) {
    return absl::FailedPreconditionError(
        "this server has no web port, so there is no page to invite to: start tickmarkd with "
        "--http-listen HOST:PORT (docs/web.md)");
  }
  Invite invite;
  invite.session_id = request.session_id();
  invite.role = request.role();
  invite.subject = request.subject();
  switch (request.role()) {
    case v1::ROLE_TRAINER:
      if (!rpc::IsValidName(request.subject())) {
        return absl::InvalidArgumentError(
            "a trainer invite needs a subject: 1-64 characters of letters, digits, '.', '_', ':' "
            "or '-' (a pseudonym, not a real name)");
      }
      break;
    case v1::ROLE_OBSERVER:
      if (!request.subject().empty() && !rpc::IsValidName(request.subject())) {
        return absl::InvalidArgumentError("subject has characters outside [A-Za-z0-9._:-]");
      }
      if (request.graded_values_size() > 0) {
        return absl::InvalidArgumentError("graded values are for trainer invites");
      }
      break;
    default:
      return absl::InvalidArgumentError(
          "invites are for trainers (the trainer page) or observers (the live view)");
  }
  if (request.graded_values_size() > 9) {
    return absl::InvalidArgumentError("at most 9 graded values (keys 1-9 on the page)");
  }
  for (double v : request.graded_values()) {
    if (!std::isfinite(v) || std::abs(v) > options_.max_abs_value) {
      return absl::InvalidArgumentError(
          Cat("graded value ", v, " is not a finite number within ±", options_.max_abs_value));
    }
    invite.graded_values.push_back(v);
  }
  if (request.expires_in_ns() < 0) {
    return absl::InvalidArgumentError("expires_in_ns is negative");
  }
  const Duration ttl =
      request.expires_in_ns() == 0 ? options_.invite_ttl : Duration::Nanos(request.expires_in_ns());
  if (ttl > options_.codes.max_ttl) {
    return absl::InvalidArgumentError(
        Cat("an invite lasts at most ", options_.codes.max_ttl.nanos() / 3'600'000'000'000, " h"));
  }
  auto runtime = server_->hub()->Get(request.session_id());
  if (!runtime.ok()) return runtime.status();
  if (!(*runtime)->open()) {
    return absl::FailedPreconditionError("session is closed; no new invites");
  }
  auto code = codes_.Create(std::move(invite), ttl);
  if (!code.ok()) return code.status();
  v1::CreateInviteResponse out;
  out.set_code(*code);
  out.set_url(Cat(base_url_, "/join#", *code));
  out.set_expires_session_ns(((*runtime)->Now() + ttl).nanos());
  out.set_session_id(request.session_id());
  out.set_role(request.role());
  out.set_subject(request.subject());
  return out;
}

absl::StatusOr<JoinGrant> WebBridge::Join(const std::string& code, const std::string& peer) {
  if (!started_) return absl::UnavailableError("the server is stopping");
  auto invite = codes_.Redeem(code, peer);
  if (!invite.ok()) return invite.status();
  // From here a failure gives the code back, unless the session is gone.
  auto runtime = server_->hub()->Get(invite->session_id);
  if (!runtime.ok()) return runtime.status();
  if (!(*runtime)->open()) {
    return absl::FailedPreconditionError("this session has closed; there is nothing to join");
  }
  auto issued = server_->auth()->Issue(invite->session_id, invite->role, invite->subject,
                                       (*runtime)->Now().nanos());
  if (!issued.ok()) {
    codes_.Release(code);
    return absl::UnavailableError(Cat("the server could not issue a token (",
                                      issued.status().message(),
                                      "); try the link again in a moment"));
  }
  JoinGrant grant;
  grant.token = issued->second;
  grant.session_id = invite->session_id;
  grant.role = invite->role;
  grant.subject = invite->subject;
  grant.graded_values = invite->graded_values;
  if (auto row = server_->hub()->ledger()->GetSession(invite->session_id); row.ok()) {
    grant.session_title = row->title;
  }
  TM_LOG(kInfo) << "web: " << peer << " joined session " << invite->session_id << " as "
                << v1::Role_Name(invite->role)
                << (invite->subject.empty() ? "" : " " + invite->subject) << " (token "
                << issued->first.id << ")";
  return grant;
}

}  // namespace tickmark::web

// Fuzzes what the web port reads from browsers (server/web/): HTTP requests
// through HttpRouter::Route (any method, target, headers and body, with a
// join function that answers anything), the pages' socket messages
// (ParseTrainerPageMessage, ParseSubscribePageMessage) and join codes
// (JoinCodeStore::Normalize and Redeem).
//
// Checks the stated contracts, not only that nothing crashes: every answer
// carries the security headers and a status from the router's set; a page
// or asset answer is the embedded file itself; the join function is reached
// only by a same-origin JSON POST to /api/join; a parsed trainer message has
// a body, and its JSON printing reads back and settles; a parsed
// subscription names a token and a session; a normalized code is 16
// characters of Crockford's alphabet and its display form normalizes back;
// a code redeems only if it normalizes to the store's one code.
//
// Input layout (FuzzedDataProvider): integers from the end (the mode, then
// the mode's choices), byte strings from the front.
#include <fuzzer/FuzzedDataProvider.h>
#include <google/protobuf/util/json_util.h>

#include <cstddef>
#include <cstdint>
#include <set>
#include <string>

#include "server/web/assets.h"
#include "server/web/http_router.h"
#include "server/web/join_codes.h"
#include "server/web/page_messages.h"

namespace {

namespace v1 = tickmark::v1;
using tickmark::web::HttpRequest;
using tickmark::web::HttpResponse;
using tickmark::web::JoinGrant;

void Require(bool promise) {
  if (!promise) __builtin_trap();
}

void FuzzRoute(FuzzedDataProvider& in) {
  static const char* kMethods[] = {"GET", "HEAD", "POST", "PUT", "DELETE", "OPTIONS"};
  static const char* kTargets[] = {"/",
                                   "/join",
                                   "/trainer",
                                   "/live",
                                   "/api/join",
                                   "/assets/style.css",
                                   "/assets/trainer.js",
                                   "/assets/"};
  HttpRequest r;
  r.method = in.ConsumeBool() ? kMethods[in.ConsumeIntegralInRange<size_t>(0, 5)]
                              : in.ConsumeRandomLengthString(16);
  r.target = in.ConsumeBool() ? kTargets[in.ConsumeIntegralInRange<size_t>(0, 7)]
                              : in.ConsumeRandomLengthString(128);
  r.tls = in.ConsumeBool();
  r.host = "127.0.0.1:8080";
  r.origin = in.ConsumeBool() ? std::string(r.tls ? "https://" : "http://") + r.host
                              : in.ConsumeRandomLengthString(64);
  r.content_type = in.ConsumeBool() ? "application/json" : in.ConsumeRandomLengthString(32);
  r.if_none_match = in.ConsumeRandomLengthString(24);
  r.peer = "127.0.0.1";
  const int answer = in.ConsumeIntegralInRange<int>(0, 6);
  r.body = in.ConsumeRemainingBytesAsString();
  bool joined = false;
  tickmark::web::HttpRouter router([&](const std::string&, const std::string& peer) {
    joined = true;
    Require(peer == "127.0.0.1");
    absl::StatusOr<JoinGrant> out = JoinGrant{"tmk_x", "s-1", "t", v1::ROLE_TRAINER, "tr", {1}};
    switch (answer) {
      case 0:
        return out;
      case 1:
        return absl::StatusOr<JoinGrant>(absl::NotFoundError("no"));
      case 2:
        return absl::StatusOr<JoinGrant>(absl::FailedPreconditionError("used"));
      case 3:
        return absl::StatusOr<JoinGrant>(absl::DeadlineExceededError("old"));
      case 4:
        return absl::StatusOr<JoinGrant>(absl::ResourceExhaustedError("slow"));
      case 5:
        return absl::StatusOr<JoinGrant>(absl::InternalError("\"\\\n\x01"));
      default:
        return absl::StatusOr<JoinGrant>(absl::InvalidArgumentError("bad"));
    }
  });
  const HttpResponse res = router.Route(r);
  static const std::set<int> kStatuses = {200, 304, 400, 403, 404, 405,
                                          410, 413, 415, 429, 500, 503};
  Require(kStatuses.count(res.status) == 1);
  Require(res.Header("Content-Security-Policy").find("frame-ancestors 'none'") !=
          std::string::npos);
  Require(res.Header("X-Frame-Options") == "DENY");
  Require(res.Header("X-Content-Type-Options") == "nosniff");
  Require(res.Header("Strict-Transport-Security").empty() == !r.tls);
  const std::string path = tickmark::web::PathOf(r.target);
  if (joined) {
    Require(path == "/api/join" && r.method == "POST" &&
            tickmark::web::SameOrigin(r.origin, r.host, r.tls) &&
            r.content_type.rfind("application/json", 0) == 0);
  }
  if (path != "/api/join" && res.status == 200) {
    const std::string etag = res.Header("ETag");
    size_t n = 0;
    const tickmark::web::Asset* all = tickmark::web::AllAssets(&n);
    bool found = false;
    for (size_t i = 0; i < n; ++i) {
      if (all[i].etag == etag) {
        found = true;
        Require(res.body == (r.method == "HEAD" ? "" : std::string(all[i].body)));
        Require(res.Header("Content-Type") == all[i].content_type);
      }
    }
    Require(found);
  }
}

void FuzzTrainerMessage(FuzzedDataProvider& in) {
  const std::string text = in.ConsumeRemainingBytesAsString();
  auto m = tickmark::web::ParseTrainerPageMessage(text);
  if (!m.ok()) return;
  Require(m->body_case() != v1::TrainerMessage::BODY_NOT_SET);
  // What the bridge prints reads back, and printing is stable from the
  // second round (a value of -0.0 prints as -0, which reads back as +0.0,
  // the default, which is then left out).
  std::string first, second, third;
  Require(google::protobuf::util::MessageToJsonString(*m, &first).ok());
  auto again = tickmark::web::ParseTrainerPageMessage(first);
  Require(again.ok());
  Require(google::protobuf::util::MessageToJsonString(*again, &second).ok());
  auto third_message = tickmark::web::ParseTrainerPageMessage(second);
  Require(third_message.ok());
  Require(google::protobuf::util::MessageToJsonString(*third_message, &third).ok());
  Require(second == third);
}

void FuzzSubscribe(FuzzedDataProvider& in) {
  auto s = tickmark::web::ParseSubscribePageMessage(in.ConsumeRemainingBytesAsString());
  if (!s.ok()) return;
  Require(!s->token.empty() && !s->session_id.empty());
}

void FuzzCode(FuzzedDataProvider& in) {
  using tickmark::web::JoinCodeStore;
  const std::string text = in.ConsumeRemainingBytesAsString();
  const std::string n = JoinCodeStore::Normalize(text);
  if (!n.empty()) {
    Require(n.size() == 16);
    for (char c : n) {
      Require(std::string("0123456789ABCDEFGHJKMNPQRSTVWXYZ").find(c) != std::string::npos);
    }
    Require(JoinCodeStore::Normalize(JoinCodeStore::Display(n)) == n);
  }
  static tickmark::FakeMonotonic clock;
  JoinCodeStore store(&clock, {});
  tickmark::web::Invite invite;
  invite.session_id = "s-1";
  auto code = store.Create(invite, tickmark::Duration::Seconds(60));
  Require(code.ok());
  auto redeemed = store.Redeem(text, "p");
  Require(redeemed.ok() == (!n.empty() && n == JoinCodeStore::Normalize(*code)));
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  FuzzedDataProvider in(data, size);
  switch (in.ConsumeIntegralInRange<int>(0, 3)) {
    case 0:
      FuzzRoute(in);
      break;
    case 1:
      FuzzTrainerMessage(in);
      break;
    case 2:
      FuzzSubscribe(in);
      break;
    default:
      FuzzCode(in);
      break;
  }
  return 0;
}

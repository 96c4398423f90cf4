// The web port's routing, security headers and join call (HttpRouter), the
// page messages (page_messages.h) and the invite link's base, fed requests
// and text without sockets.
#include "server/web/http_router.h"

#include <gtest/gtest.h>

#include <regex>

#include "server/web/assets.h"
#include "server/web/page_messages.h"
#include "server/web/web_bridge.h"

namespace tickmark::web {
namespace {

namespace v1 = tickmark::v1;

HttpRequest Get(const std::string& target) {
  HttpRequest r;
  r.method = "GET";
  r.target = target;
  r.host = "127.0.0.1:8080";
  r.peer = "127.0.0.1";
  return r;
}

HttpRequest PostJoin(const std::string& body) {
  HttpRequest r = Get("/api/join");
  r.method = "POST";
  r.body = body;
  r.content_type = "application/json";
  r.origin = "http://127.0.0.1:8080";
  return r;
}

class RouterTest : public ::testing::Test {
 protected:
  std::string last_code_, last_peer_;
  absl::StatusOr<JoinGrant> answer_ = absl::NotFoundError("unset");
  HttpRouter router_{[this](const std::string& code, const std::string& peer) {
    last_code_ = code;
    last_peer_ = peer;
    return answer_;
  }};
};

TEST_F(RouterTest, PagesAndAssetsByPath) {
  struct Case {
    std::string target;
    int status;
    std::string type;
    std::string contains;
  };
  for (const Case& c : std::vector<Case>{
           {"/", 200, "text/html; charset=utf-8", "Join a session"},
           {"/join", 200, "text/html; charset=utf-8", "Join a session"},
           {"/join?x=1", 200, "text/html; charset=utf-8", "Join a session"},
           {"/trainer", 200, "text/html; charset=utf-8", "Approve"},
           {"/live", 200, "text/html; charset=utf-8", "Timeline"},
           {"/assets/style.css", 200, "text/css; charset=utf-8", ":root"},
           {"/assets/trainer.js", 200, "text/javascript; charset=utf-8", "'use strict'"},
           {"/assets/mark.svg", 200, "image/svg+xml", "<svg"},
           // Pages only under their own paths; nothing outside the folder.
           {"/assets/trainer.html", 404, "", ""},
           {"/assets/../CMakeLists.txt", 404, "", ""},
           {"/assets/.hidden", 404, "", ""},
           {"/assets/", 404, "", ""},
           {"/trainer/", 404, "", ""},
           {"/etc/passwd", 404, "", ""},
       }) {
    HttpResponse r = router_.Route(Get(c.target));
    EXPECT_EQ(r.status, c.status) << c.target;
    if (c.status != 200) continue;
    EXPECT_EQ(r.Header("Content-Type"), c.type) << c.target;
    EXPECT_NE(r.body.find(c.contains), std::string::npos) << c.target;
    EXPECT_EQ(r.Header("Cache-Control"), "no-cache") << c.target;
    EXPECT_FALSE(r.Header("ETag").empty()) << c.target;
  }
}

TEST_F(RouterTest, MethodsHeadAndRevalidation) {
  HttpRequest post = Get("/trainer");
  post.method = "POST";
  HttpResponse r = router_.Route(post);
  EXPECT_EQ(r.status, 405);
  EXPECT_EQ(r.Header("Allow"), "GET, HEAD");
  HttpRequest head = Get("/trainer");
  head.method = "HEAD";
  r = router_.Route(head);
  EXPECT_EQ(r.status, 200);
  EXPECT_TRUE(r.body.empty());
  HttpRequest again = Get("/trainer");
  again.if_none_match = r.Header("ETag");
  EXPECT_EQ(router_.Route(again).status, 304);  // RFC 9110 §13.1.2
  EXPECT_EQ(router_.Route(Get("/api/join")).status, 405);
}

TEST_F(RouterTest, EveryAnswerCarriesTheSecurityHeaders) {
  for (bool tls : {false, true}) {
    for (const std::string target : {"/", "/trainer", "/live", "/assets/live.js", "/nope"}) {
      HttpRequest req = Get(target);
      req.tls = tls;
      HttpResponse r = router_.Route(req);
      const std::string csp = r.Header("Content-Security-Policy");
      // W3C Content Security Policy Level 3: own scripts only, nothing
      // inline, no framing (frame-ancestors), nothing by default.
      EXPECT_NE(csp.find("default-src 'none'"), std::string::npos) << target;
      EXPECT_NE(csp.find("script-src 'self'"), std::string::npos) << target;
      EXPECT_NE(csp.find("frame-ancestors 'none'"), std::string::npos) << target;
      EXPECT_EQ(csp.find("unsafe"), std::string::npos) << target;
      EXPECT_EQ(r.Header("X-Frame-Options"), "DENY") << target;  // RFC 7034
      EXPECT_EQ(r.Header("X-Content-Type-Options"), "nosniff") << target;
      EXPECT_EQ(r.Header("Referrer-Policy"), "no-referrer") << target;
      // RFC 6797: HSTS only over TLS.
      EXPECT_EQ(r.Header("Strict-Transport-Security").empty(), !tls) << target;
    }
  }
}

TEST_F(RouterTest, NoPageHasInlineScriptOrHandlers) {
  size_t n = 0;
  const Asset* all = AllAssets(&n);
  ASSERT_GT(n, 5u);
  const std::regex script("<script([^>]*)>([^<]*)</script>");
  const std::regex handler("\\son[a-z]+\\s*=", std::regex::icase);
  for (size_t i = 0; i < n; ++i) {
    const std::string name(all[i].name);
    if (name.size() < 5 || name.substr(name.size() - 5) != ".html") continue;
    const std::string html(all[i].body);
    for (std::sregex_iterator it(html.begin(), html.end(), script), end; it != end; ++it) {
      EXPECT_NE((*it)[1].str().find("src=\"/assets/"), std::string::npos) << name;
      EXPECT_TRUE((*it)[2].str().empty()) << name << ": inline script";
    }
    EXPECT_FALSE(std::regex_search(html, handler)) << name << ": inline handler";
    EXPECT_EQ(html.find("http://"), std::string::npos) << name << ": a link off the server";
    EXPECT_EQ(html.find("https://"), std::string::npos) << name << ": a link off the server";
  }
}

TEST_F(RouterTest, JoinPassesTheCodeAndPeerAndAnswersWithTheGrant) {
  JoinGrant g;
  g.token = "tmk_secret";
  g.session_id = "s-1";
  g.session_title = "dock \"rover\"";
  g.role = v1::ROLE_TRAINER;
  g.subject = "tr-07";
  g.graded_values = {-1, 0.5};
  answer_ = g;
  HttpResponse r = router_.Route(PostJoin(R"({"code": "ABCD-EFGH-JKMN-PQRS"})"));
  EXPECT_EQ(r.status, 200);
  EXPECT_EQ(last_code_, "ABCD-EFGH-JKMN-PQRS");
  EXPECT_EQ(last_peer_, "127.0.0.1");
  EXPECT_EQ(r.Header("Content-Type"), "application/json");
  EXPECT_EQ(r.Header("Cache-Control"), "no-store");
  for (const char* part :
       {R"("token":"tmk_secret")", R"("page":"/trainer")", R"("sessionTitle":"dock \"rover\"")",
        R"("gradedValues":[-1,0.5])", R"("role":"trainer")", R"("subject":"tr-07")"}) {
    EXPECT_NE(r.body.find(part), std::string::npos) << part << " in " << r.body;
  }
  g.role = v1::ROLE_OBSERVER;
  answer_ = g;
  EXPECT_NE(router_.Route(PostJoin(R"({"code": "x"})")).body.find(R"("page":"/live")"),
            std::string::npos);
}

TEST_F(RouterTest, JoinFailuresBecomeStatusesThePageExplains) {
  struct Case {
    absl::Status status;
    int http;
    std::string code;
  };
  for (const Case& c : std::vector<Case>{
           {absl::NotFoundError("not valid"), 404, "unknown"},
           {absl::FailedPreconditionError("used already"), 410, "used"},
           {absl::DeadlineExceededError("expired"), 410, "expired"},
           {absl::InvalidArgumentError("not a code"), 400, "malformed"},
           {absl::ResourceExhaustedError("too many"), 429, "rate_limited"},
           {absl::UnavailableError("later"), 503, "error"},
       }) {
    answer_ = c.status;
    HttpResponse r = router_.Route(PostJoin(R"({"code": "x"})"));
    EXPECT_EQ(r.status, c.http) << c.status;
    EXPECT_NE(r.body.find("\"code\":\"" + c.code + "\""), std::string::npos) << r.body;
    EXPECT_NE(r.body.find(std::string(c.status.message())), std::string::npos) << r.body;
    EXPECT_EQ(r.Header("Retry-After").empty(), c.http != 429);
  }
}

TEST_F(RouterTest, JoinRefusesWhatAPageWouldNotSend) {
  last_code_ = "untouched";
  HttpRequest foreign = PostJoin(R"({"code": "x"})");
  foreign.origin = "https://elsewhere.example";
  EXPECT_EQ(router_.Route(foreign).status, 403);
  HttpRequest form = PostJoin("code=x");
  form.content_type = "application/x-www-form-urlencoded";
  EXPECT_EQ(router_.Route(form).status, 415);
  for (const char* body : {"", "{", "[]", R"({"code": 7})", R"({"kode": "x"})"}) {
    EXPECT_EQ(router_.Route(PostJoin(body)).status, 400) << body;
  }
  EXPECT_EQ(router_.Route(PostJoin(std::string(kMaxRequestBody + 1, ' '))).status, 413);
  EXPECT_EQ(last_code_, "untouched");
}

TEST(OriginTest, SameOriginNeedsSchemeHostAndPort) {
  EXPECT_TRUE(SameOrigin("", "a:1", false));  // not sent: not a cross-site browser request
  EXPECT_TRUE(SameOrigin("http://a:1", "a:1", false));
  EXPECT_TRUE(SameOrigin("https://a:1", "a:1", true));
  EXPECT_FALSE(SameOrigin("http://a:1", "a:1", true));
  EXPECT_FALSE(SameOrigin("http://a:2", "a:1", false));
  EXPECT_FALSE(SameOrigin("http://b:1", "a:1", false));
  EXPECT_FALSE(SameOrigin("null", "a:1", false));
  EXPECT_EQ(PathOf("/live?x#y"), "/live");
}

TEST(OriginTest, ThePublicOriginCountsAsOurOwn) {
  HttpRouter router(
      [](const std::string&, const std::string&) -> absl::StatusOr<JoinGrant> {
        return absl::NotFoundError("no");
      },
      "https://lab.example.org:8443");
  HttpRequest proxied = PostJoin(R"({"code": "x"})");  // TLS ended at a proxy
  proxied.origin = "https://lab.example.org:8443";
  EXPECT_TRUE(router.OriginAllowed(proxied));
  EXPECT_EQ(router.Route(proxied).status, 404);  // reached the join function
  proxied.origin = "https://lab.example.org";
  EXPECT_FALSE(router.OriginAllowed(proxied));
  EXPECT_EQ(*PublicOrigin("https://lab.example.org:8443/"), "https://lab.example.org:8443");
  EXPECT_EQ(*PublicOrigin(""), "");
  for (const char* bad : {"lab.example.org", "ftp://lab", "https://", "https://lab/tickmark",
                          "https://user@lab", "https://lab?x"}) {
    EXPECT_EQ(PublicOrigin(bad).status().code(), absl::StatusCode::kInvalidArgument) << bad;
  }
}

TEST(MetricsRouteTest, ServedOnlyWhenAskedWithTheTextFormatsType) {
  HttpRouter router([](const std::string&, const std::string&) -> absl::StatusOr<JoinGrant> {
    return absl::NotFoundError("no");
  });
  HttpRequest get;
  get.method = "GET";
  get.target = "/metrics";
  EXPECT_EQ(router.Route(get).status, 404);  // not served unless ServeMetrics
  router.ServeMetrics([] { return std::string("demo_total 1\n"); });
  const HttpResponse r = router.Route(get);
  EXPECT_EQ(r.status, 200);
  EXPECT_EQ(r.body, "demo_total 1\n");
  // Prometheus text format 0.0.4's media type (from memory).
  EXPECT_EQ(r.Header("Content-Type"), "text/plain; version=0.0.4; charset=utf-8");
  EXPECT_EQ(r.Header("Cache-Control"), "no-store");
  get.method = "HEAD";
  EXPECT_EQ(router.Route(get).body, "");
  get.method = "POST";
  EXPECT_EQ(router.Route(get).status, 405);
}

TEST(InviteBaseUrlTest, FromThePublicUrlOrTheListenAddress) {
  EXPECT_EQ(InviteBaseUrl("https://lab.example.org:8443/", "0.0.0.0", 8443, true, "h"),
            "https://lab.example.org:8443");
  EXPECT_EQ(InviteBaseUrl("", "127.0.0.1", 8080, false, "h"), "http://127.0.0.1:8080");
  EXPECT_EQ(InviteBaseUrl("", "0.0.0.0", 8443, true, "rig-3"), "https://rig-3:8443");
  EXPECT_EQ(InviteBaseUrl("", "::", 8443, true, "rig-3"), "https://rig-3:8443");
  EXPECT_EQ(InviteBaseUrl("", "::1", 8080, false, "h"), "http://[::1]:8080");
}

TEST(PageMessagesTest, TrainerMessagesInTheJsonMapping) {
  auto m = ParseTrainerPageMessage(
      R"({"feedback": {"clientSequence": "3", "value": -0.5, "eventSourceNs": "1796279913141100000", "input": "web:touch"}})");
  ASSERT_TRUE(m.ok()) << m.status();
  EXPECT_EQ(m->feedback().client_sequence(), 3u);
  EXPECT_EQ(m->feedback().value(), -0.5);
  EXPECT_EQ(m->feedback().event_source_ns(), 1796279913141100000);
  EXPECT_EQ(m->feedback().input(), "web:touch");
  auto probe = ParseTrainerPageMessage(
      R"({"probeReply": {"probeId": "9", "t1SessionNs": "1", "t2ClientNs": "2", "t3ClientNs": "3"}})");
  ASSERT_TRUE(probe.ok());
  EXPECT_EQ(probe->probe_reply().t3_client_ns(), 3);
  for (const char* bad : {"", "{}", "{\"feedback\": {\"valu\": 1}}", "[1]", "{\"hello\": 3}"}) {
    EXPECT_EQ(ParseTrainerPageMessage(bad).status().code(), absl::StatusCode::kInvalidArgument)
        << bad;
  }
  EXPECT_FALSE(ParseTrainerPageMessage(std::string(kMaxPageMessageBytes + 1, ' ')).ok());
  // RFC 8259 §7: control characters inside a string are escaped; the fuzz
  // target found protobuf's parser taking a raw NUL (fuzz/corpus/web_page/
  // regress-raw-nul-in-string).
  const char raw_nul[] = "{\"feedback\": {\"input\": \"a\0b\"}}";
  EXPECT_FALSE(ParseTrainerPageMessage(std::string(raw_nul, sizeof(raw_nul) - 1)).ok());
  EXPECT_TRUE(ParseTrainerPageMessage("{\"feedback\":\n\t{\"input\": \"a\\u0000b\"}}\r\n").ok());
}

TEST(PageMessagesTest, TheBridgeVouchesForTheSourceNotThePage) {
  v1::Hello hello;
  hello.set_source_kind(v1::SOURCE_KIND_INPUT_DEVICE);
  hello.set_software("forged/9");
  StampHello(&hello, "Mozilla/5.0\n(X11)\x01");
  EXPECT_EQ(hello.source_kind(), v1::SOURCE_KIND_WEB);
  EXPECT_EQ(hello.software(), "tickmark-web/0.1");
  EXPECT_EQ(hello.source_description(), "web page: Mozilla/5.0?(X11)?");
  StampHello(&hello, std::string(1000, 'a'));
  EXPECT_LE(hello.source_description().size(), 200u);
}

TEST(PageMessagesTest, WhatThePageReceives) {
  v1::ServerMessage welcome;
  welcome.mutable_welcome()->set_session_id("s-1");
  welcome.mutable_welcome()->set_udp_probe_port(7462);
  welcome.mutable_welcome()->set_udp_probe_key(std::string(32, 'k'));
  const std::string w = ServerMessageToPage(welcome);
  EXPECT_NE(w.find(R"("sessionId":"s-1")"), std::string::npos) << w;
  EXPECT_EQ(w.find("a2tr"), std::string::npos) << w;  // base64 of "kkk": the key is gone
  EXPECT_NE(w.find(R"("udpProbePort":0)"), std::string::npos) << w;
  v1::ServerMessage ack;
  ack.mutable_ack()->set_client_sequence(4);
  EXPECT_NE(ServerMessageToPage(ack).find(R"("code":0)"), std::string::npos);  // always present
  v1::Record r;
  r.set_sequence(12);
  r.set_hash(std::string(32, 'h'));
  r.mutable_step()->set_state("big state");
  r.mutable_step()->add_features(1.5f);
  r.mutable_step()->set_action("north");
  const std::string page = RecordToPage(r);
  EXPECT_EQ(page.rfind(R"({"record":{)", 0), 0u) << page;
  EXPECT_NE(page.find(R"("action":"north")"), std::string::npos);
  EXPECT_EQ(page.find("state"), std::string::npos) << page;
  EXPECT_EQ(page.find("features"), std::string::npos) << page;
  EXPECT_EQ(page.find("hash"), std::string::npos) << page;
  EXPECT_EQ(EndToPage(7, "no \"way\""), R"({"end":{"code":7,"message":"no \"way\""}})");
}

TEST(PageMessagesTest, Subscribe) {
  auto s = ParseSubscribePageMessage(
      R"({"subscribe": {"token": "tmk_x", "sessionId": "s-1", "fromSequence": "41"}})");
  ASSERT_TRUE(s.ok()) << s.status();
  EXPECT_EQ(s->token, "tmk_x");
  EXPECT_EQ(s->session_id, "s-1");
  EXPECT_EQ(s->from_sequence, 41u);
  auto n = ParseSubscribePageMessage(
      R"({"subscribe": {"token": "t", "sessionId": "s", "fromSequence": 7}})");
  ASSERT_TRUE(n.ok());
  EXPECT_EQ(n->from_sequence, 7u);
  for (const char* bad :
       {"{}", R"({"subscribe": {"sessionId": "s"}})", R"({"subscribe": {"token": "t"}})",
        R"({"subscribe": {"token": "t", "sessionId": "s", "fromSequence": "-1"}})",
        R"({"subscribe": {"token": "t", "sessionId": "s", "fromSequence": 1.5}})",
        R"({"subscribe": {"token": "t", "sessionId": "s", "fromSequence": true}})"}) {
    EXPECT_FALSE(ParseSubscribePageMessage(bad).ok()) << bad;
  }
}

}  // namespace
}  // namespace tickmark::web

// The web bridge against a real in-process tickmarkd: invites and joins
// through SessionAdmin.CreateInvite, the relays between a (fake) page and
// the server's own Train and Subscribe streams, and the web port's TLS and
// plaintext rules. The browser tests (test_web_page.py) drive the same
// paths from a real page.
#include "server/web/web_bridge.h"

#include <google/protobuf/util/json_util.h>
#include <gtest/gtest.h>
#include <openssl/bio.h>
#include <openssl/evp.h>
#include <openssl/pem.h>
#include <openssl/x509.h>
#include <sqlite3.h>

#include <boost/asio/ssl.hpp>
#include <boost/beast/core.hpp>
#include <boost/beast/http.hpp>
#include <boost/beast/ssl.hpp>
#include <chrono>
#include <cmath>
#include <condition_variable>
#include <deque>
#include <fstream>
#include <functional>
#include <mutex>

#include "tests/rpc/test_server.h"

namespace tickmark::web {
namespace {

namespace v1 = tickmark::v1;
using tickmark::testing::MonoNowNs;
using tickmark::testing::TempDir;

// A page as the relays see it: keeps what it is sent.
class FakePage final : public PageSocket {
 public:
  void Send(std::string text) override {
    std::lock_guard<std::mutex> lock(mu_);
    messages_.push_back(std::move(text));
    cv_.notify_all();
  }
  void Close() override {
    std::lock_guard<std::mutex> lock(mu_);
    closed_ = true;
    cv_.notify_all();
  }
  // Waits up to 20 s for Close().
  bool closed() {
    std::unique_lock<std::mutex> lock(mu_);
    return cv_.wait_for(lock, std::chrono::seconds(20), [this] { return closed_; });
  }

  // The first message so far (from the start) that satisfies `want`, waiting
  // up to 20 s for it; meanwhile answers the server's clock probes, once
  // each, with CLOCK_MONOTONIC, as a page answers with performance.now().
  // "" if none came.
  std::string Until(Relay* relay, const std::function<bool(const std::string&)>& want) {
    const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(20);
    std::unique_lock<std::mutex> lock(mu_);
    while (true) {
      while (answered_ < messages_.size()) {
        const std::string m = messages_[answered_++];
        if (m.find("{\"probe\":") != 0) continue;
        const int64_t t2 = MonoNowNs();
        v1::ServerMessage probe;
        EXPECT_TRUE(google::protobuf::util::JsonStringToMessage(m, &probe).ok()) << m;
        lock.unlock();
        relay->OnPageMessage("{\"probeReply\": {\"probeId\": \"" +
                             std::to_string(probe.probe().probe_id()) + "\", \"t1SessionNs\": \"" +
                             std::to_string(probe.probe().t1_session_ns()) +
                             "\", \"t2ClientNs\": \"" + std::to_string(t2) +
                             "\", \"t3ClientNs\": \"" + std::to_string(MonoNowNs()) + "\"}}");
        lock.lock();
      }
      for (const std::string& m : messages_) {
        if (want(m)) return m;
      }
      if (cv_.wait_until(lock, deadline) == std::cv_status::timeout) return "";
    }
  }
  std::string UntilContains(Relay* relay, const std::string& needle) {
    return Until(relay, [&](const std::string& m) { return m.find(needle) != std::string::npos; });
  }

 private:
  std::mutex mu_;
  std::condition_variable cv_;
  std::deque<std::string> messages_;  // GUARDED_BY(mu_)
  size_t answered_ = 0;               // probes answered up to here; GUARDED_BY(mu_)
  bool closed_ = false;               // GUARDED_BY(mu_)
};

struct PemPair {
  std::string cert_file;
  std::string key_file;
};

std::string ToPem(int (*write)(BIO*, void*), void* object) {
  std::unique_ptr<BIO, decltype(&BIO_free)> bio(BIO_new(BIO_s_mem()), &BIO_free);
  write(bio.get(), object);
  char* data = nullptr;
  const long n = BIO_get_mem_data(bio.get(), &data);
  return std::string(data, static_cast<size_t>(n));
}

// A self-signed certificate for "localhost" (OpenSSL, X509_sign).
PemPair MakePair(const std::string& dir) {
  EVP_PKEY* key = EVP_EC_gen("P-256");
  X509* cert = X509_new();
  X509_set_version(cert, 2);
  ASN1_INTEGER_set(X509_get_serialNumber(cert), 1);
  X509_gmtime_adj(X509_getm_notBefore(cert), 0);
  X509_gmtime_adj(X509_getm_notAfter(cert), 3600);
  X509_set_pubkey(cert, key);
  X509_NAME* subject = X509_get_subject_name(cert);
  X509_NAME_add_entry_by_txt(subject, "CN", MBSTRING_ASC,
                             reinterpret_cast<const unsigned char*>("localhost"), -1, -1, 0);
  X509_set_issuer_name(cert, subject);
  X509_sign(cert, key, EVP_sha256());
  PemPair p{dir + "/web.crt", dir + "/web.key"};
  std::ofstream(p.cert_file) << ToPem(
      [](BIO* b, void* x) { return PEM_write_bio_X509(b, static_cast<X509*>(x)); }, cert);
  std::ofstream(p.key_file) << ToPem(
      [](BIO* b, void* k) {
        return PEM_write_bio_PrivateKey(b, static_cast<EVP_PKEY*>(k), nullptr, nullptr, 0, nullptr,
                                        nullptr);
      },
      key);
  X509_free(cert);
  EVP_PKEY_free(key);
  return p;
}

class WebBridgeTest : public ::testing::Test {
 protected:
  static WebOptions Web() {
    WebOptions w;
    w.http_listen = "127.0.0.1:0";
    return w;
  }

  void Start(const WebOptions& web = Web()) {
    bridge_ = std::make_unique<WebBridge>(web);
    rpc::ServerOptions o;
    o.listen = "127.0.0.1:0";
    o.data_dir = dir_.path();
    o.live = testing::TestLiveOptions();
    if (bridge_->enabled()) o.invites = bridge_.get();
    auto s = rpc::TickmarkServer::Start(o);
    ASSERT_TRUE(s.ok()) << s.status();
    server_ = std::move(*s);
    ASSERT_TRUE(bridge_->Start(server_.get()).ok());
    std::ifstream in(server_->operator_token_path());
    std::getline(in, operator_);
    channel_ = grpc::CreateChannel("127.0.0.1:" + std::to_string(server_->port()),
                                   grpc::InsecureChannelCredentials());
    admin_ = v1::SessionAdmin::NewStub(channel_);
    v1::CreateSessionRequest req;
    req.set_title("bridge trial");
    v1::CreateSessionResponse resp;
    auto ctx = Ctx(operator_);
    ASSERT_TRUE(admin_->CreateSession(ctx.get(), req, &resp).ok());
    session_ = resp.session().id();
    admin_token_ = resp.admin_secret();
    context_.channel = server_->grpc_server()->InProcessChannel(grpc::ChannelArguments());
    context_.hub = server_->hub();
  }

  void TearDown() override {
    if (bridge_) bridge_->Stop();
    if (server_) server_->Shutdown(Duration::Seconds(1));
  }

  std::unique_ptr<grpc::ClientContext> Ctx(const std::string& token) {
    auto ctx = std::make_unique<grpc::ClientContext>();
    ctx->AddMetadata("authorization", "Bearer " + token);
    ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(20));
    return ctx;
  }

  grpc::Status Invite(const v1::CreateInviteRequest& req, v1::CreateInviteResponse* resp,
                      const std::string& token = "") {
    auto ctx = Ctx(token.empty() ? admin_token_ : token);
    return admin_->CreateInvite(ctx.get(), req, resp);
  }

  v1::CreateInviteRequest TrainerInvite(const std::string& subject = "tr-07") {
    v1::CreateInviteRequest req;
    req.set_session_id(session_);
    req.set_role(v1::ROLE_TRAINER);
    req.set_subject(subject);
    return req;
  }

  // A token of the invite's role, through a code, as a page gets one.
  std::string JoinAs(v1::Role role, const std::string& subject) {
    v1::CreateInviteRequest req = TrainerInvite(subject);
    req.set_role(role);
    v1::CreateInviteResponse resp;
    EXPECT_TRUE(Invite(req, &resp).ok());
    auto grant = bridge_->Join(resp.code(), "127.0.0.1");
    EXPECT_TRUE(grant.ok()) << grant.status();
    return grant.ok() ? grant->token : "";
  }

  TempDir dir_;
  std::unique_ptr<WebBridge> bridge_;  // before server_: outlives it
  std::unique_ptr<rpc::TickmarkServer> server_;
  std::string operator_;
  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<v1::SessionAdmin::Stub> admin_;
  std::string session_;
  std::string admin_token_;
  RelayContext context_;
};

TEST_F(WebBridgeTest, InvitesNeedTheWebPort) {
  Start(WebOptions{});  // no --http-listen
  v1::CreateInviteResponse resp;
  grpc::Status s = Invite(TrainerInvite(), &resp);
  EXPECT_EQ(s.error_code(), grpc::StatusCode::FAILED_PRECONDITION);
  EXPECT_NE(s.error_message().find("--http-listen"), std::string::npos) << s.error_message();
}

TEST_F(WebBridgeTest, AnInviteIsALinkWithACodeThatBecomesATokenOnce) {
  Start();
  v1::CreateInviteResponse resp;
  v1::CreateInviteRequest req = TrainerInvite();
  req.add_graded_values(-0.5);
  req.add_graded_values(0.5);
  ASSERT_TRUE(Invite(req, &resp).ok());
  EXPECT_EQ(resp.url(), bridge_->base_url() + "/join#" + resp.code());
  EXPECT_EQ(resp.url().rfind("http://127.0.0.1:" + std::to_string(bridge_->port()), 0), 0u);
  EXPECT_EQ(resp.code().size(), 19u);
  const int64_t now = server_->hub()->Find(session_)->Now().nanos();
  EXPECT_NEAR(static_cast<double>(resp.expires_session_ns() - now), 15 * 60e9, 10e9);
  auto grant = bridge_->Join(resp.code(), "10.1.1.1");
  ASSERT_TRUE(grant.ok()) << grant.status();
  EXPECT_EQ(grant->session_title, "bridge trial");
  EXPECT_EQ(grant->graded_values, (std::vector<double>{-0.5, 0.5}));
  auto who = server_->auth()->Authenticate(grant->token);
  ASSERT_TRUE(who.ok());
  EXPECT_EQ(who->session_id, session_);
  EXPECT_EQ(who->role, v1::ROLE_TRAINER);
  EXPECT_EQ(who->subject, "tr-07");
  EXPECT_EQ(bridge_->Join(resp.code(), "10.1.1.1").status().code(),
            absl::StatusCode::kFailedPrecondition);
}

TEST_F(WebBridgeTest, InvitesAreCheckedAndOnlyForAdmins) {
  Start();
  v1::CreateInviteResponse resp;
  const std::string trainer = JoinAs(v1::ROLE_TRAINER, "tr-01");
  EXPECT_EQ(Invite(TrainerInvite(), &resp, trainer).error_code(),
            grpc::StatusCode::PERMISSION_DENIED);
  EXPECT_TRUE(Invite(TrainerInvite(), &resp, operator_).ok());
  std::vector<std::pair<std::string, v1::CreateInviteRequest>> bad;
  bad.emplace_back("no subject", TrainerInvite(""));
  bad.emplace_back("real name?", TrainerInvite("Ada Lovelace"));
  auto agent = TrainerInvite();
  agent.set_role(v1::ROLE_AGENT);
  bad.emplace_back("agent", agent);
  auto observer_graded = TrainerInvite();
  observer_graded.set_role(v1::ROLE_OBSERVER);
  observer_graded.add_graded_values(1);
  bad.emplace_back("observer with values", observer_graded);
  auto ten = TrainerInvite();
  for (int i = 0; i < 10; ++i) ten.add_graded_values(i);
  bad.emplace_back("ten values", ten);
  auto nan = TrainerInvite();
  nan.add_graded_values(std::nan(""));
  bad.emplace_back("NaN", nan);
  auto huge = TrainerInvite();
  huge.add_graded_values(1e6);
  bad.emplace_back("beyond the value bound", huge);
  auto long_lived = TrainerInvite();
  long_lived.set_expires_in_ns(8LL * 24 * 3600 * 1'000'000'000);
  bad.emplace_back("8 days", long_lived);
  auto negative = TrainerInvite();
  negative.set_expires_in_ns(-1);
  bad.emplace_back("negative lifetime", negative);
  for (const auto& [what, req] : bad) {
    EXPECT_EQ(Invite(req, &resp).error_code(), grpc::StatusCode::INVALID_ARGUMENT) << what;
  }
}

TEST_F(WebBridgeTest, AClosedSessionTakesNoInvitesAndItsCodesNoJoins) {
  Start();
  v1::CreateInviteResponse made;
  ASSERT_TRUE(Invite(TrainerInvite(), &made).ok());
  v1::CloseSessionRequest close;
  close.set_session_id(session_);
  v1::Session closed;
  auto ctx = Ctx(admin_token_);
  ASSERT_TRUE(admin_->CloseSession(ctx.get(), close, &closed).ok());
  v1::CreateInviteResponse resp;
  EXPECT_EQ(Invite(TrainerInvite(), &resp).error_code(), grpc::StatusCode::FAILED_PRECONDITION);
  auto late = bridge_->Join(made.code(), "127.0.0.1");
  EXPECT_EQ(late.status().code(), absl::StatusCode::kFailedPrecondition);
  EXPECT_NE(late.status().message().find("closed"), std::string::npos);
}

TEST_F(WebBridgeTest, ATrainerPageIsTimedAndStoredLikeAnyClient) {
  Start();
  const std::string token = JoinAs(v1::ROLE_TRAINER, "tr-07");
  auto page = std::make_shared<FakePage>();
  std::shared_ptr<Relay> relay = MakeTrainRelay(context_, page, "TestBrowser/1.0");
  relay->OnPageMessage(R"({"hello": {"token": ")" + token +
                       R"(", "clientId": "web-test", "sentClientNs": ")" +
                       std::to_string(MonoNowNs()) + "\"}}");
  const std::string welcome = page->UntilContains(relay.get(), "\"welcome\"");
  ASSERT_FALSE(welcome.empty());
  EXPECT_NE(welcome.find(R"("subject":"tr-07")"), std::string::npos) << welcome;
  EXPECT_NE(welcome.find(R"("lastClientSequence":"0")"), std::string::npos) << welcome;
  const std::string feedback =
      R"({"feedback": {"clientSequence": "1", "value": 1, "eventSourceNs": ")" +
      std::to_string(MonoNowNs() - 50'000'000) + R"(", "input": "web:key:f"}})";
  relay->OnPageMessage(feedback);
  const std::string ack = page->UntilContains(relay.get(), "\"ack\"");
  v1::ServerMessage m;
  ASSERT_TRUE(google::protobuf::util::JsonStringToMessage(ack, &m).ok()) << ack;
  EXPECT_EQ(m.ack().code(), 0) << m.ack().message();
  EXPECT_EQ(m.ack().client_sequence(), 1u);
  EXPECT_GT(m.ack().event_session_ns(), 0);
  EXPECT_GT(m.ack().uncertainty_ns(), 0);
  EXPECT_FALSE(page->UntilContains(relay.get(), "\"clock\"").empty());  // the server's model
  relay->OnPageMessage(feedback);  // a resend after a reconnect: stored once
  const std::string dup = page->UntilContains(relay.get(), "\"duplicate\":true");
  EXPECT_FALSE(dup.empty());
  relay->OnPageClosed();
  EXPECT_TRUE(context_.calls->WaitIdle(Duration::Seconds(10)));

  // The ledger names the source as the bridge vouched for it.
  ASSERT_TRUE(server_->hub()->ledger()->Flush().ok());
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open_v2(server_->ledger_path().c_str(), &db, SQLITE_OPEN_READONLY, nullptr),
            SQLITE_OK);
  sqlite3_stmt* st = nullptr;
  ASSERT_EQ(sqlite3_prepare_v2(db,
                               "SELECT source_kind, software, source_description, "
                               "(SELECT COUNT(*) FROM feedback f WHERE f.client_id = c.client_id) "
                               "FROM client c WHERE client_id = 'web-test'",
                               -1, &st, nullptr),
            SQLITE_OK);
  ASSERT_EQ(sqlite3_step(st), SQLITE_ROW);
  EXPECT_STREQ(reinterpret_cast<const char*>(sqlite3_column_text(st, 0)), "web");
  EXPECT_STREQ(reinterpret_cast<const char*>(sqlite3_column_text(st, 1)), "tickmark-web/0.1");
  EXPECT_STREQ(reinterpret_cast<const char*>(sqlite3_column_text(st, 2)),
               "web page: TestBrowser/1.0");
  EXPECT_EQ(sqlite3_column_int(st, 3), 1);
  sqlite3_finalize(st);
  sqlite3_close(db);
}

TEST_F(WebBridgeTest, APageThatBreaksTheProtocolIsToldWhyAndClosed) {
  Start();
  const std::string token = JoinAs(v1::ROLE_TRAINER, "tr-07");
  struct Case {
    std::vector<std::string> messages;
    std::string why;
  };
  const std::string hello = R"({"hello": {"token": ")" + token + R"(", "clientId": "web-x"}})";
  for (const Case& c : std::vector<Case>{
           {{"not json"}, "not a TrainerMessage"},
           {{R"({"feedback": {"value": 1}})"}, "first message must be a hello"},
           {{hello, hello}, "one hello per connection"},
       }) {
    auto page = std::make_shared<FakePage>();
    std::shared_ptr<Relay> relay = MakeTrainRelay(context_, page, "");
    for (const auto& m : c.messages) relay->OnPageMessage(m);
    const std::string end = page->UntilContains(relay.get(), "\"end\"");
    EXPECT_NE(end.find("\"code\":3"), std::string::npos) << end;
    EXPECT_NE(end.find(c.why), std::string::npos) << end;
    EXPECT_TRUE(page->closed());
    relay->OnPageClosed();
  }
  // A token the server does not know ends the stream with its refusal.
  auto page = std::make_shared<FakePage>();
  std::shared_ptr<Relay> relay = MakeTrainRelay(context_, page, "");
  relay->OnPageMessage(R"({"hello": {"token": "tmk_forged", "clientId": "web-y"}})");
  const std::string end = page->UntilContains(relay.get(), "\"end\"");
  EXPECT_NE(end.find("\"code\":16"), std::string::npos) << end;  // UNAUTHENTICATED
  relay->OnPageClosed();
  EXPECT_TRUE(context_.calls->WaitIdle(Duration::Seconds(10)));
}

TEST_F(WebBridgeTest, TheLiveViewFollowsTheSessionAndRefusesATrainerToken) {
  Start();
  const std::string observer = JoinAs(v1::ROLE_OBSERVER, "");
  auto page = std::make_shared<FakePage>();
  std::shared_ptr<Relay> relay = MakeLiveRelay(context_, page);
  relay->OnPageMessage(R"({"subscribe": {"token": ")" + observer + R"(", "sessionId": ")" +
                       session_ + R"(", "fromSequence": "1"}})");
  EXPECT_FALSE(page->UntilContains(relay.get(), "\"summary\"").empty());
  const std::string first = page->UntilContains(relay.get(), "\"record\"");
  EXPECT_NE(first.find("\"sequence\":\"1\""), std::string::npos) << first;
  EXPECT_NE(first.find("KIND_OPENED"), std::string::npos) << first;
  v1::AddMarkerRequest marker;
  marker.set_session_id(session_);
  marker.set_text("block 2");
  v1::AddMarkerResponse added;
  auto ctx = Ctx(admin_token_);
  ASSERT_TRUE(admin_->AddMarker(ctx.get(), marker, &added).ok());
  EXPECT_FALSE(page->UntilContains(relay.get(), "block 2").empty());  // live, after the replay
  relay->OnPageClosed();

  const std::string trainer = JoinAs(v1::ROLE_TRAINER, "tr-02");
  auto refused = std::make_shared<FakePage>();
  std::shared_ptr<Relay> r2 = MakeLiveRelay(context_, refused);
  r2->OnPageMessage(R"({"subscribe": {"token": ")" + trainer + R"(", "sessionId": ")" + session_ +
                    R"("}})");
  const std::string end = refused->UntilContains(r2.get(), "\"end\"");
  EXPECT_NE(end.find("\"code\":7"), std::string::npos) << end;  // PERMISSION_DENIED
  EXPECT_TRUE(refused->closed());
  r2->OnPageClosed();
  EXPECT_TRUE(context_.calls->WaitIdle(Duration::Seconds(10)));
}

TEST_F(WebBridgeTest, HttpsWithTheServersCertificate) {
  const PemPair pair = MakePair(dir_.path());
  WebOptions web = Web();
  web.tls_cert_file = pair.cert_file;
  web.tls_key_file = pair.key_file;
  Start(web);
  EXPECT_EQ(bridge_->base_url().rfind("https://", 0), 0u) << bridge_->base_url();
  namespace asio = boost::asio;
  namespace beast = boost::beast;
  namespace http = beast::http;
  asio::io_context ioc;
  asio::ssl::context tls(asio::ssl::context::tls_client);
  tls.load_verify_file(pair.cert_file);
  tls.set_verify_mode(asio::ssl::verify_peer);
  beast::ssl_stream<beast::tcp_stream> stream(ioc, tls);
  SSL_set_tlsext_host_name(stream.native_handle(), "localhost");
  stream.set_verify_callback(asio::ssl::host_name_verification("localhost"));
  beast::get_lowest_layer(stream).connect(asio::ip::tcp::endpoint(
      asio::ip::make_address("127.0.0.1"), static_cast<unsigned short>(bridge_->port())));
  stream.handshake(asio::ssl::stream_base::client);  // throws if the certificate is not ours
  http::request<http::empty_body> req{http::verb::get, "/trainer", 11};
  req.set(http::field::host, "localhost:" + std::to_string(bridge_->port()));
  http::write(stream, req);
  beast::flat_buffer buffer;
  http::response<http::string_body> res;
  http::read(stream, buffer, res);
  EXPECT_EQ(res.result_int(), 200u);
  EXPECT_EQ(std::string(res["Strict-Transport-Security"]), "max-age=31536000");
  EXPECT_NE(res.body().find("Approve"), std::string::npos);
}

TEST_F(WebBridgeTest, PlaintextOnlyOnLoopbackUnlessAllowed) {
  WebOptions web = Web();
  web.http_listen = "0.0.0.0:0";
  WebBridge refused(web);
  rpc::ServerOptions o;
  o.listen = "127.0.0.1:0";
  o.data_dir = dir_.path();
  auto s = rpc::TickmarkServer::Start(o);
  ASSERT_TRUE(s.ok());
  absl::Status st = refused.Start(s->get());
  EXPECT_EQ(st.code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(st.message().find("refusing plaintext HTTP on 0.0.0.0:0"), std::string::npos) << st;
  web.allow_insecure_remote = true;
  WebBridge allowed(web);
  EXPECT_TRUE(allowed.Start(s->get()).ok());
  allowed.Stop();
  (*s)->Shutdown(Duration::Zero());
}

}  // namespace
}  // namespace tickmark::web

// SessionAdmin over real gRPC on 127.0.0.1:0: each RPC, and the token rules
// of docs/architecture.md §7 (a token of session A can do nothing in session B; tokens
// are stored hashed).
#include <grpcpp/generic/generic_stub.h>
#include <sqlite3.h>

#include <future>
#include <limits>
#include <thread>

#include "server/ledger/sqlite/sqlite_ledger.h"
#include "server/rpc/auth.h"
#include "server/rpc/credit_driver.h"
#include "tests/rpc/forwarding_ledger.h"
#include "tests/rpc/test_server.h"

namespace tickmark::testing {
namespace {

class AdminTest : public ::testing::Test {
 protected:
  TempDir dir_;
  TestServer server_{dir_.path()};
};

TEST_F(AdminTest, CreateNeedsTheOperatorToken) {
  v1::CreateSessionRequest req;
  v1::CreateSessionResponse resp;
  auto none = server_.Context("");
  EXPECT_EQ(server_.admin().CreateSession(none.get(), req, &resp).error_code(),
            grpc::StatusCode::UNAUTHENTICATED);
  auto bad = server_.Context("tmk_not-a-real-token");
  EXPECT_EQ(server_.admin().CreateSession(bad.get(), req, &resp).error_code(),
            grpc::StatusCode::UNAUTHENTICATED);
  auto [session, admin] = server_.CreateSession("dock rover");
  auto as_session_admin = server_.Context(admin);
  EXPECT_EQ(server_.admin().CreateSession(as_session_admin.get(), req, &resp).error_code(),
            grpc::StatusCode::PERMISSION_DENIED);
}

TEST_F(AdminTest, GetListClose) {
  auto [a, admin_a] = server_.CreateSession("first");
  auto [b, admin_b] = server_.CreateSession("second");
  v1::ListSessionsRequest lreq;
  v1::ListSessionsResponse lresp;
  auto ctx = server_.Context(server_.operator_token());
  ASSERT_TRUE(server_.admin().ListSessions(ctx.get(), lreq, &lresp).ok());
  EXPECT_EQ(lresp.sessions_size(), 2);

  v1::GetSessionRequest greq;
  greq.set_session_id(a);
  v1::SessionSummary summary;
  auto gctx = server_.Context(admin_a);
  ASSERT_TRUE(server_.admin().GetSession(gctx.get(), greq, &summary).ok());
  EXPECT_EQ(summary.session().title(), "first");
  EXPECT_EQ(summary.session().state(), v1::SESSION_STATE_OPEN);
  EXPECT_GE(summary.session().last_sequence(), 1u);  // the "opened" record

  v1::CloseSessionRequest creq;
  creq.set_session_id(a);
  v1::Session closed;
  auto cctx = server_.Context(admin_a);
  ASSERT_TRUE(server_.admin().CloseSession(cctx.get(), creq, &closed).ok());
  EXPECT_EQ(closed.state(), v1::SESSION_STATE_CLOSED);
  auto again = server_.Context(admin_a);
  EXPECT_EQ(server_.admin().CloseSession(again.get(), creq, &closed).error_code(),
            grpc::StatusCode::FAILED_PRECONDITION);

  lresp.Clear();
  auto lctx = server_.Context(server_.operator_token());
  ASSERT_TRUE(server_.admin().ListSessions(lctx.get(), lreq, &lresp).ok());
  EXPECT_EQ(lresp.sessions_size(), 1);  // closed ones only with include_closed
}

TEST_F(AdminTest, UnknownSessionIsNotFound) {
  v1::GetSessionRequest req;
  req.set_session_id("s-00000000");
  v1::SessionSummary resp;
  auto ctx = server_.Context(server_.operator_token());
  EXPECT_EQ(server_.admin().GetSession(ctx.get(), req, &resp).error_code(),
            grpc::StatusCode::NOT_FOUND);
}

TEST_F(AdminTest, ATokenOfOneSessionCanDoNothingInAnother) {
  auto [a, admin_a] = server_.CreateSession("a");
  auto [b, admin_b] = server_.CreateSession("b");
  {
    v1::GetSessionRequest req;
    req.set_session_id(b);
    v1::SessionSummary resp;
    auto ctx = server_.Context(admin_a);
    EXPECT_EQ(server_.admin().GetSession(ctx.get(), req, &resp).error_code(),
              grpc::StatusCode::PERMISSION_DENIED);
  }
  {
    v1::IssueTokenRequest req;
    req.set_session_id(b);
    req.set_role(v1::ROLE_TRAINER);
    req.set_subject("ava");
    v1::IssueTokenResponse resp;
    auto ctx = server_.Context(admin_a);
    EXPECT_EQ(server_.admin().IssueToken(ctx.get(), req, &resp).error_code(),
              grpc::StatusCode::PERMISSION_DENIED);
  }
  {
    v1::AddMarkerRequest req;
    req.set_session_id(b);
    req.set_text("x");
    v1::AddMarkerResponse resp;
    auto ctx = server_.Context(admin_a);
    EXPECT_EQ(server_.admin().AddMarker(ctx.get(), req, &resp).error_code(),
              grpc::StatusCode::PERMISSION_DENIED);
  }
  {
    v1::SubscribeRequest req;
    req.set_session_id(b);
    req.set_stop_at_end(true);
    auto ctx = server_.Context(admin_a);
    auto reader = server_.live().Subscribe(ctx.get(), req);
    v1::Record r;
    EXPECT_FALSE(reader->Read(&r));
    EXPECT_EQ(reader->Finish().error_code(), grpc::StatusCode::PERMISSION_DENIED);
  }
  {
    // A trainer token of A streaming: it lands in A only.
    std::string trainer_a = server_.IssueToken(a, v1::ROLE_TRAINER, "ava", admin_a);
    auto t = OpenTrainer(server_);
    ASSERT_TRUE(t->SendHello(trainer_a, "pad-1"));
    auto welcome = t->Welcome();
    ASSERT_TRUE(welcome);
    EXPECT_EQ(welcome->session_id(), a);
  }
}

TEST_F(AdminTest, IssueTokenValidatesRoleAndSubject) {
  auto [s, admin] = server_.CreateSession();
  auto issue = [&](v1::Role role, const std::string& subject) {
    v1::IssueTokenRequest req;
    req.set_session_id(s);
    req.set_role(role);
    req.set_subject(subject);
    v1::IssueTokenResponse resp;
    auto ctx = server_.Context(admin);
    return server_.admin().IssueToken(ctx.get(), req, &resp).error_code();
  };
  EXPECT_EQ(issue(v1::ROLE_TRAINER, ""), grpc::StatusCode::INVALID_ARGUMENT);
  EXPECT_EQ(issue(v1::ROLE_TRAINER, "has space"), grpc::StatusCode::INVALID_ARGUMENT);
  EXPECT_EQ(issue(v1::ROLE_AGENT, std::string(65, 'a')), grpc::StatusCode::INVALID_ARGUMENT);
  EXPECT_EQ(issue(v1::ROLE_UNSPECIFIED, "x"), grpc::StatusCode::INVALID_ARGUMENT);
  EXPECT_EQ(issue(v1::ROLE_TRAINER, "trainer-07"), grpc::StatusCode::OK);
  EXPECT_EQ(issue(v1::ROLE_OBSERVER, ""), grpc::StatusCode::OK);
}

TEST_F(AdminTest, TokensAreStoredHashedNeverInTheClear) {
  auto [s, admin] = server_.CreateSession();
  std::string secret = server_.IssueToken(s, v1::ROLE_TRAINER, "ava", admin);
  server_.Shutdown();
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open((dir_.path() + "/tickmark.db").c_str(), &db), SQLITE_OK);
  sqlite3_stmt* q = nullptr;
  ASSERT_EQ(sqlite3_prepare_v2(db,
                               "SELECT COUNT(*) FROM token WHERE secret_sha256 = ?1 "
                               "AND instr(CAST(secret_sha256 AS TEXT), ?2) = 0",
                               -1, &q, nullptr),
            SQLITE_OK);
  // SHA-256 (FIPS 180-4) via OpenSSL, the same digest the server stores.
  std::string digest = *rpc::HashSecret(secret);
  sqlite3_bind_blob(q, 1, digest.data(), static_cast<int>(digest.size()), SQLITE_TRANSIENT);
  sqlite3_bind_text(q, 2, secret.c_str(), -1, SQLITE_TRANSIENT);
  ASSERT_EQ(sqlite3_step(q), SQLITE_ROW);
  EXPECT_EQ(sqlite3_column_int(q, 0), 1);
  sqlite3_finalize(q);
  // And the secret text appears nowhere in the token table.
  ASSERT_EQ(sqlite3_prepare_v2(db,
                               "SELECT COUNT(*) FROM token WHERE id = ?1 OR subject = ?1 "
                               "OR CAST(secret_sha256 AS TEXT) = ?1",
                               -1, &q, nullptr),
            SQLITE_OK);
  sqlite3_bind_text(q, 1, secret.c_str(), -1, SQLITE_TRANSIENT);
  ASSERT_EQ(sqlite3_step(q), SQLITE_ROW);
  EXPECT_EQ(sqlite3_column_int(q, 0), 0);
  sqlite3_finalize(q);
  sqlite3_close(db);
  // Nor anywhere in the ledger's files, byte for byte.
  for (const char* name : {"/tickmark.db", "/tickmark.db-wal"}) {
    std::ifstream in(dir_.path() + name, std::ios::binary);
    const std::string bytes((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
    EXPECT_EQ(bytes.find(secret), std::string::npos) << name;
    EXPECT_EQ(bytes.find(secret.substr(4)), std::string::npos) << name;  // without "tmk_"
  }
}

TEST_F(AdminTest, RevokedTokenIsRefusedAndItsStreamEnds) {
  auto [s, admin] = server_.CreateSession();
  std::string secret = server_.IssueToken(s, v1::ROLE_TRAINER, "ava", admin);
  auto t = OpenTrainer(server_);
  ASSERT_TRUE(t->SendHello(secret, "pad-1"));
  ASSERT_TRUE(t->Welcome());

  v1::ListTokensRequest lreq;
  lreq.set_session_id(s);
  v1::ListTokensResponse tokens;
  auto lctx = server_.Context(admin);
  ASSERT_TRUE(server_.admin().ListTokens(lctx.get(), lreq, &tokens).ok());
  std::string trainer_id;
  for (const auto& tk : tokens.tokens()) {
    if (tk.role() == v1::ROLE_TRAINER) trainer_id = tk.token_id();
  }
  ASSERT_FALSE(trainer_id.empty());
  v1::RevokeTokenRequest req;
  req.set_session_id(s);
  req.set_token_id(trainer_id);
  v1::RevokeTokenResponse resp;
  auto ctx = server_.Context(admin);
  ASSERT_TRUE(server_.admin().RevokeToken(ctx.get(), req, &resp).ok());
  EXPECT_TRUE(resp.token().revoked());

  EXPECT_FALSE(t->Next());
  EXPECT_EQ(t->Finish().error_code(), grpc::StatusCode::UNAUTHENTICATED);
  auto t2 = OpenTrainer(server_);
  t2->SendHello(secret, "pad-1");
  EXPECT_FALSE(t2->Next());
  EXPECT_EQ(t2->Finish().error_code(), grpc::StatusCode::UNAUTHENTICATED);
}

TEST_F(AdminTest, MarkerIsStoredAndAcknowledgedWithItsSequence) {
  auto [s, admin] = server_.CreateSession();
  v1::AddMarkerRequest req;
  req.set_session_id(s);
  req.set_text("block 2 starts");
  v1::AddMarkerResponse resp;
  auto ctx = server_.Context(admin);
  ASSERT_TRUE(server_.admin().AddMarker(ctx.get(), req, &resp).ok());
  EXPECT_GT(resp.sequence(), 1u);
  EXPECT_EQ(resp.marker().text(), "block 2 starts");
  req.set_text("");
  auto ctx2 = server_.Context(admin);
  EXPECT_EQ(server_.admin().AddMarker(ctx2.get(), req, &resp).error_code(),
            grpc::StatusCode::INVALID_ARGUMENT);
}

// Regression: the "within a day" check subtracted in int64 (undefined
// behaviour for these, caught by UBSan).
TEST_F(AdminTest, MarkerTimesAtTheEndsOfInt64AreRefused) {
  auto [s, admin] = server_.CreateSession();
  for (int64_t at : {std::numeric_limits<int64_t>::min(), std::numeric_limits<int64_t>::max(),
                     std::numeric_limits<int64_t>::min() + 1}) {
    v1::AddMarkerRequest req;
    req.set_session_id(s);
    req.set_text("far away");
    req.set_at_session_ns(at);
    v1::AddMarkerResponse resp;
    auto ctx = server_.Context(admin);
    EXPECT_EQ(server_.admin().AddMarker(ctx.get(), req, &resp).error_code(),
              grpc::StatusCode::INVALID_ARGUMENT)
        << at;
  }
}

}  // namespace
}  // namespace tickmark::testing

namespace tickmark::testing {
namespace {

// Regression: a failed start (here: a ledger path that cannot be opened)
// crashed in the destructor, which shut down a server never built.
TEST(ServerStartTest, AFailedStartReportsItsErrorAndCleansUp) {
  TempDir dir;
  rpc::ServerOptions o;
  o.listen = "127.0.0.1:0";
  o.data_dir = dir.path();
  o.ledger_path = dir.path() + "/no-such-folder/x.db";
  auto s = rpc::TickmarkServer::Start(o);
  EXPECT_FALSE(s.ok());
  o.ledger_path.clear();
  o.listen = "192.0.2.1:0";  // RFC 5737 documentation address; plaintext refused
  auto remote = rpc::TickmarkServer::Start(o);
  EXPECT_EQ(remote.status().code(), absl::StatusCode::kInvalidArgument);
}

}  // namespace
}  // namespace tickmark::testing

namespace tickmark::testing {
namespace {

// Regression (issue 9.10): an agent token could add markers; the role table
// says admin only. Every role against AddMarker.
TEST_F(AdminTest, MarkersFollowTheRoleTable) {
  auto [s, admin] = server_.CreateSession();
  struct Case {
    const char* who;
    std::string token;
    grpc::StatusCode want;
  };
  const std::vector<Case> table = {
      {"operator", server_.operator_token(), grpc::StatusCode::OK},
      {"admin", admin, grpc::StatusCode::OK},
      {"admin (issued)", server_.IssueToken(s, v1::ROLE_ADMIN, "", admin), grpc::StatusCode::OK},
      {"trainer", server_.IssueToken(s, v1::ROLE_TRAINER, "ava", admin),
       grpc::StatusCode::PERMISSION_DENIED},
      {"agent", server_.IssueToken(s, v1::ROLE_AGENT, "rover", admin),
       grpc::StatusCode::PERMISSION_DENIED},
      {"observer", server_.IssueToken(s, v1::ROLE_OBSERVER, "", admin),
       grpc::StatusCode::PERMISSION_DENIED},
      {"no token", "", grpc::StatusCode::UNAUTHENTICATED},
  };
  for (const Case& c : table) {
    v1::AddMarkerRequest req;
    req.set_session_id(s);
    req.set_text(std::string("by ") + c.who);
    v1::AddMarkerResponse resp;
    auto ctx = server_.Context(c.token);
    EXPECT_EQ(server_.admin().AddMarker(ctx.get(), req, &resp).error_code(), c.want) << c.who;
  }
}

// Issue 10.6: session show/list name the session's kernel; the text is the
// canonical form, which parses back to the same kernel.
TEST_F(AdminTest, SummaryNamesTheDefaultKernelAlsoAfterARestart) {
  v1::CreateSessionRequest req;
  req.set_title("gamma session");
  req.set_default_kernel("gamma:2,0.28");
  v1::CreateSessionResponse created;
  auto ctx = server_.Context(server_.operator_token());
  ASSERT_TRUE(server_.admin().CreateSession(ctx.get(), req, &created).ok());
  auto [plain, plain_admin] = server_.CreateSession("server default");
  const std::string want = rpc::ParseKernel("gamma:2,0.28")->Describe();

  auto summary_of = [](TestServer& server, const std::string& id, v1::SessionSummary* out) {
    v1::GetSessionRequest g;
    g.set_session_id(id);
    auto c = server.Context(server.operator_token());
    return server.admin().GetSession(c.get(), g, out);
  };
  v1::SessionSummary summary;
  ASSERT_TRUE(summary_of(server_, created.session().id(), &summary).ok());
  EXPECT_EQ(summary.default_kernel(), want);
  ASSERT_TRUE(rpc::ParseKernel(summary.default_kernel()).ok());
  v1::SessionSummary plain_summary;
  ASSERT_TRUE(summary_of(server_, plain, &plain_summary).ok());
  EXPECT_EQ(plain_summary.default_kernel(),
            rpc::SessionHub::Options{}.default_kernel.Describe());
  EXPECT_TRUE(summary.ledger_health().writable());
  EXPECT_EQ(summary.ledger_health().reason(), "");

  // After a restart the session is not loaded: the kernel comes from the ledger.
  server_.Shutdown();
  TestServer again(dir_.path());
  v1::SessionSummary reread;
  ASSERT_TRUE(summary_of(again, created.session().id(), &reread).ok());
  EXPECT_EQ(reread.default_kernel(), want);
  v1::ListSessionsRequest lreq;
  v1::ListSessionsResponse listed;
  auto lctx = again.Context(again.operator_token());
  ASSERT_TRUE(again.admin().ListSessions(lctx.get(), lreq, &listed).ok());
  ASSERT_EQ(listed.sessions_size(), 2);
  for (const auto& s : listed.sessions()) {
    EXPECT_FALSE(s.default_kernel().empty()) << s.session().id();
    EXPECT_TRUE(s.has_ledger_health());
  }
}

// A ledger whose WriteHealth the test sets; everything else is the real
// SQLite ledger underneath (a fault-injecting wrapper, not a mock).
class WriteHealthLedger final : public ForwardingLedger {
 public:
  explicit WriteHealthLedger(std::unique_ptr<ledger::Ledger> inner)
      : ForwardingLedger(std::move(inner)) {}

  void SetWriteHealth(absl::Status s) {
    std::lock_guard<std::mutex> lock(mu_);
    health_ = std::move(s);
  }
  absl::Status WriteHealth() override {
    std::lock_guard<std::mutex> lock(mu_);
    return health_;
  }

 private:
  std::mutex mu_;
  absl::Status health_;  // GUARDED_BY(mu_)
};

// grpc.health.v1.Health/Check for the whole server (service ""), by hand
// with the generic stub: the request is empty, the response's field 1 is
// the status (health.proto in the gRPC repository: 1 SERVING, 2 NOT_SERVING).
int HealthStatus(const std::shared_ptr<grpc::Channel>& channel) {
  grpc::GenericStub stub(channel);
  grpc::ClientContext ctx;
  ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(10));
  grpc::ByteBuffer request;  // empty HealthCheckRequest
  grpc::Slice empty;
  request = grpc::ByteBuffer(&empty, 1);
  grpc::ByteBuffer response;
  std::promise<grpc::Status> done;
  stub.UnaryCall(&ctx, "/grpc.health.v1.Health/Check", grpc::StubOptions(), &request, &response,
                 [&done](grpc::Status s) { done.set_value(std::move(s)); });
  grpc::Status s = done.get_future().get();
  if (!s.ok()) return -1;
  std::vector<grpc::Slice> slices;
  if (!response.Dump(&slices).ok()) return -1;
  std::string bytes;
  for (const auto& slice : slices) bytes.append(reinterpret_cast<const char*>(slice.begin()), slice.size());
  if (bytes.empty()) return 0;  // UNKNOWN: field 1 absent
  if (bytes.size() != 2 || bytes[0] != 0x08) return -2;
  return bytes[1];
}
constexpr int kServing = 1;
constexpr int kNotServing = 2;

// Waits (with a deadline) until the health service reports `want`.
bool AwaitHealth(const std::shared_ptr<grpc::Channel>& channel, int want) {
  const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(10);
  while (std::chrono::steady_clock::now() < deadline) {
    if (HealthStatus(channel) == want) return true;
    std::this_thread::sleep_for(std::chrono::milliseconds(5));
  }
  return false;
}

// Issue 9.2: the server says so (session show, health) while the ledger
// cannot write, and says so again when it can.
TEST(LedgerHealthTest, HealthAndSummaryFollowTheLedgersWriteHealth) {
  TempDir dir;
  ledger::SqliteLedger::Options lo;
  lo.path = dir.path() + "/tickmark.db";
  auto sqlite = ledger::SqliteLedger::Open(lo);
  ASSERT_TRUE(sqlite.ok()) << sqlite.status().message();
  auto wrapper = std::make_unique<WriteHealthLedger>(std::move(*sqlite));
  WriteHealthLedger* ledger = wrapper.get();
  rpc::ServerOptions o;
  o.listen = "127.0.0.1:0";
  o.data_dir = dir.path();
  o.health_interval = Duration::Millis(10);  // the production default is 1 s
  auto server = rpc::TickmarkServer::Start(o, std::move(wrapper));
  ASSERT_TRUE(server.ok()) << server.status().message();
  std::string operator_token;
  std::ifstream((*server)->operator_token_path()) >> operator_token;
  auto channel = grpc::CreateChannel("127.0.0.1:" + std::to_string((*server)->port()),
                                     grpc::InsecureChannelCredentials());
  auto admin = v1::SessionAdmin::NewStub(channel);
  auto summary = [&] {
    v1::ListSessionsRequest req;
    v1::ListSessionsResponse resp;
    grpc::ClientContext ctx;
    ctx.AddMetadata("authorization", "Bearer " + operator_token);
    EXPECT_TRUE(admin->ListSessions(&ctx, req, &resp).ok());
    return resp.sessions_size() > 0 ? resp.sessions(0) : v1::SessionSummary{};
  };
  {
    v1::CreateSessionRequest req;
    v1::CreateSessionResponse resp;
    grpc::ClientContext ctx;
    ctx.AddMetadata("authorization", "Bearer " + operator_token);
    ASSERT_TRUE(admin->CreateSession(&ctx, req, &resp).ok());
  }

  EXPECT_EQ(HealthStatus(channel), kServing);
  EXPECT_TRUE(summary().ledger_health().writable());

  ledger->SetWriteHealth(absl::ResourceExhaustedError("database or disk is full"));
  EXPECT_TRUE(AwaitHealth(channel, kNotServing));
  v1::SessionSummary failing = summary();
  EXPECT_FALSE(failing.ledger_health().writable());
  EXPECT_EQ(failing.ledger_health().reason(), "RESOURCE_EXHAUSTED: database or disk is full");

  ledger->SetWriteHealth(absl::OkStatus());
  EXPECT_TRUE(AwaitHealth(channel, kServing));
  EXPECT_TRUE(summary().ledger_health().writable());
  EXPECT_EQ(summary().ledger_health().reason(), "");
  (*server)->Shutdown(Duration::Seconds(1));
}

}  // namespace
}  // namespace tickmark::testing

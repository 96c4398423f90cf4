// SessionAdmin over real gRPC on 127.0.0.1:0: each RPC, and the token rules
// of design.md §7 (a token of session A can do nothing in session B; tokens
// are stored hashed).
#include <sqlite3.h>

#include "server/rpc/auth.h"
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

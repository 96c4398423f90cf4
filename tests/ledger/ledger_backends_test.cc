// The Ledger contract (server/ledger/ledger.h) run against both backends as
// typed tests: the embedded SQLite ledger and the PostgreSQL ledger on a
// real PostgreSQL 15 this test starts (tests/support/pg_server.h). Then the
// PostgreSQL ledger's own part: leases and fencing between two instances.
//
// What stays SQLite-only (other files): the side file and start-up
// refusals (ledger_startup_test: PostgreSQL has no side file; its
// durability and damage checks are the server's), the disk-full reserve file
// (disk_full_test: a full disk on the database server is PostgreSQL's to
// handle; the ledger only maps SQLSTATE class 53 to RESOURCE_EXHAUSTED), and
// the typed tables read back with the sqlite3 CLI (the PostgreSQL schema
// keeps typed tables only where the ledger's reads need them; the rest is the
// generic journal).
//
// Built a second time as ledger_contract_sqlite_test with
// TICKMARK_LEDGER_SQLITE_ONLY: the SQLite half alone, without libpq, for the
// sanitizer smoke of ./run test.
#include <gtest/gtest.h>
#include <sqlite3.h>

#include <atomic>
#include <filesystem>
#include <mutex>
#include <thread>

#include "server/ledger/sqlite/sqlite_ledger.h"
#include "tests/ledger/ledger_test_util.h"
#ifndef TICKMARK_LEDGER_SQLITE_ONLY
#include "server/ledger/postgres/postgres_ledger.h"
#include "tests/support/pg_server.h"
#endif

namespace tickmark::ledger {
namespace {

namespace v1 = tickmark::v1;
using testing::AppendAndWait;
using testing::AppendOk;
using testing::ExpectChainVerifies;
using testing::FeedbackRecord;
using testing::Session;

struct SqliteBackend {
  std::string dir, path;
  bool Prepare(std::string*) {
    dir = testing::MakeTempDir("tm-backends");
    path = dir + "/t.db";
    return true;
  }
  absl::StatusOr<std::unique_ptr<Ledger>> Open() {
    SqliteLedger::Options o;
    o.path = path;
    auto l = SqliteLedger::Open(o);
    if (!l.ok()) return l.status();
    return std::unique_ptr<Ledger>(std::move(*l));
  }
  void MarkNewerSchema() {
    sqlite3* db = nullptr;
    ASSERT_EQ(sqlite3_open(path.c_str(), &db), SQLITE_OK);
    ASSERT_EQ(
        sqlite3_exec(db, "INSERT INTO schema_migrations (version, description) VALUES (999, 'x')",
                     nullptr, nullptr, nullptr),
        SQLITE_OK);
    sqlite3_close(db);
  }
  ~SqliteBackend() {
    std::error_code ec;
    if (!dir.empty()) std::filesystem::remove_all(dir, ec);
  }
};

#ifndef TICKMARK_LEDGER_SQLITE_ONLY
using tickmark::testing::PgServer;

// One PostgreSQL server for the whole binary, started on first use.
PgServer* Postgres(std::string* why_not) {
  static std::string reason;
  static std::unique_ptr<PgServer> server = [] { return PgServer::Start(&reason); }();
  *why_not = reason;
  return server.get();
}

struct PostgresBackend {
  PgServer* server = nullptr;
  std::string url, db;
  bool Prepare(std::string* why_not) {
    server = Postgres(why_not);
    if (server == nullptr) return false;
    url = server->NewDatabase();
    db = url.substr(url.rfind('/') + 1);
    return true;
  }
  absl::StatusOr<std::unique_ptr<Ledger>> Open() {
    PostgresLedger::Options o;
    o.conninfo = url;
    auto l = PostgresLedger::Open(o);
    if (!l.ok()) return l.status();
    return std::unique_ptr<Ledger>(std::move(*l));
  }
  void MarkNewerSchema() {
    std::string error;
    server->Psql(db, "INSERT INTO schema_migrations (version, description) VALUES (999, 'x')",
                 &error);
    ASSERT_TRUE(error.empty()) << error;
  }
};
#endif

template <typename Backend>
class LedgerBackendTest : public ::testing::Test {
 protected:
  void SetUp() override {
    std::string why;
    if (!backend_.Prepare(&why)) GTEST_SKIP() << "PostgreSQL not available: " << why;
    Reopen();
  }
  void Reopen() {
    ledger_.reset();
    auto l = backend_.Open();
    ASSERT_TRUE(l.ok()) << l.status().message();
    ledger_ = std::move(*l);
  }
  std::vector<v1::Record> AppendSync(const std::string& session, std::vector<v1::Record> records) {
    return AppendOk(ledger_.get(), session, std::move(records));
  }
  Backend backend_;
  std::unique_ptr<Ledger> ledger_;
};

#ifndef TICKMARK_LEDGER_SQLITE_ONLY
using Backends = ::testing::Types<SqliteBackend, PostgresBackend>;
#else
using Backends = ::testing::Types<SqliteBackend>;
#endif
class BackendNames {
 public:
  template <typename T>
  static std::string GetName(int) {
    return std::is_same_v<T, SqliteBackend> ? "Sqlite" : "Postgres";
  }
};
TYPED_TEST_SUITE(LedgerBackendTest, Backends, BackendNames);

TYPED_TEST(LedgerBackendTest, SequencesAreConsecutivePerSessionAndSurviveReopen) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  ASSERT_TRUE(l->CreateSession(Session("s-b")).ok());
  auto a = this->AppendSync("s-a", {FeedbackRecord("c1", 1, 1), FeedbackRecord("c1", 2, -1)});
  auto b = this->AppendSync("s-b", {FeedbackRecord("c1", 1, 1)});
  ASSERT_EQ(a.size(), 2u);
  EXPECT_EQ(a[0].sequence(), 1u);
  EXPECT_EQ(a[1].sequence(), 2u);
  EXPECT_EQ(b[0].sequence(), 1u);
  EXPECT_EQ(l->CommittedSequence("s-a"), 2u);
  this->Reopen();
  l = this->ledger_.get();
  EXPECT_EQ(l->CommittedSequence("s-a"), 2u);
  auto more = this->AppendSync("s-a", {FeedbackRecord("c1", 3, 0.5)});
  ASSERT_EQ(more.size(), 1u);
  EXPECT_EQ(more[0].sequence(), 3u);
  EXPECT_EQ(more[0].hash(), *ChainHash(a[1].hash(), more[0]));
  ExpectChainVerifies(l, "s-a", 3);
}

TYPED_TEST(LedgerBackendTest, HashChainRecomputesFromStoredRecords) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  for (uint64_t i = 1; i <= 20; ++i) this->AppendSync("s-a", {FeedbackRecord("c", i, 1)});
  ExpectChainVerifies(l, "s-a", 20);
  auto all = l->Read("s-a", 1, 100);
  ASSERT_TRUE(all.ok());
  v1::Record tampered = (*all)[5];
  tampered.mutable_feedback()->set_value(-1);
  EXPECT_NE(tampered.hash(), *ChainHash((*all)[4].hash(), tampered));
}

TYPED_TEST(LedgerBackendTest, ReadFromTheMiddleAndLimit) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  for (uint64_t i = 1; i <= 10; ++i) this->AppendSync("s-a", {FeedbackRecord("c", i, 1)});
  auto part = l->Read("s-a", 4, 3);
  ASSERT_TRUE(part.ok());
  ASSERT_EQ(part->size(), 3u);
  EXPECT_EQ((*part)[0].sequence(), 4u);
  EXPECT_EQ((*part)[2].sequence(), 6u);
  EXPECT_EQ((*part)[0].feedback().client_sequence(), 4u);
  EXPECT_TRUE(l->Read("s-a", 11, 3)->empty());
}

TYPED_TEST(LedgerBackendTest, ClientSequenceLookups) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  this->AppendSync(
      "s-a", {FeedbackRecord("c1", 1, 1), FeedbackRecord("c1", 5, 1), FeedbackRecord("c2", 2, 1)});
  auto found = l->FindClientSequence("s-a", "c1", 5);
  ASSERT_TRUE(found.ok());
  ASSERT_TRUE(found->has_value());
  EXPECT_EQ(**found, 2u);
  EXPECT_FALSE(l->FindClientSequence("s-a", "c1", 3)->has_value());
  EXPECT_EQ(*l->LastClientSequence("s-a", "c1"), 5u);
  EXPECT_EQ(*l->LastClientSequence("s-a", "c3"), 0u);
}

// A group that breaks the unique client key is rolled back alone; the
// groups committed with it stay, and its sequence goes to the next append.
TYPED_TEST(LedgerBackendTest, ABadGroupFailsAloneAndTheChainHasNoHole) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  this->AppendSync("s-a", {FeedbackRecord("c1", 1, 1)});
  std::vector<absl::Status> results(3);
  std::atomic<int> done{0};
  for (int i = 0; i < 3; ++i) {
    // The middle one repeats client sequence 1.
    const uint64_t cseq = i == 1 ? 1 : static_cast<uint64_t>(10 + i);
    ASSERT_TRUE(l->Append("s-a", {FeedbackRecord("c1", cseq, 1)},
                          [&, i](const absl::Status& s, const auto&) {
                            results[static_cast<size_t>(i)] = s;
                            ++done;
                          })
                    .ok());
  }
  ASSERT_TRUE(l->Flush().ok());
  ASSERT_EQ(done.load(), 3);
  EXPECT_TRUE(results[0].ok());
  EXPECT_TRUE(absl::IsAlreadyExists(results[1])) << results[1];
  EXPECT_TRUE(results[2].ok());
  EXPECT_TRUE(l->WriteHealth().ok());
  ExpectChainVerifies(l, "s-a", 3);
}

TYPED_TEST(LedgerBackendTest, CountsByKind) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  v1::Record marker;
  marker.mutable_marker()->set_text("block 2 starts");
  v1::Record step;
  step.mutable_step()->set_client_id("agent-1");
  step.mutable_step()->set_client_sequence(1);
  step.mutable_step()->set_start_agent_ns(10);
  step.mutable_step()->set_late(true);
  v1::Record probe;
  probe.mutable_probe()->set_client_id("agent-1");
  probe.mutable_probe()->set_accepted(false);
  v1::Record joined;
  joined.mutable_client_event()->mutable_client()->set_client_id("agent-1");
  joined.mutable_client_event()->set_event(v1::ClientEvent::KIND_CONNECTED);
  this->AppendSync(
      "s-a", {joined, FeedbackRecord("c1", 1, 1), FeedbackRecord("c1", 2, 1), marker, step, probe});
  auto c = l->Counts("s-a");
  ASSERT_TRUE(c.ok());
  EXPECT_EQ(c->feedback, 2u);
  EXPECT_EQ(c->markers, 1u);
  EXPECT_EQ(c->steps, 1u);
  EXPECT_EQ(c->probes, 1u);
  EXPECT_EQ(c->rejected_probes, 1u);
  EXPECT_EQ(c->late, 1u);
  EXPECT_EQ(c->clients, 1u);
}

TYPED_TEST(LedgerBackendTest, SessionsOpenCloseAndList) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  ASSERT_TRUE(l->CreateSession(Session("s-b")).ok());
  EXPECT_FALSE(l->CreateSession(Session("s-a")).ok());
  ASSERT_TRUE(l->CloseSession("s-a", 99).ok());
  EXPECT_TRUE(absl::IsNotFound(l->CloseSession("s-zz", 99)));
  auto open = l->ListSessions(false);
  ASSERT_TRUE(open.ok());
  ASSERT_EQ(open->size(), 1u);
  EXPECT_EQ((*open)[0].id, "s-b");
  EXPECT_EQ(l->ListSessions(true)->size(), 2u);
  auto a = l->GetSession("s-a");
  ASSERT_TRUE(a.ok());
  EXPECT_FALSE(a->open);
  EXPECT_EQ(a->closed_session_ns, 99);
  EXPECT_TRUE(absl::IsNotFound(l->GetSession("s-zz").status()));
  ASSERT_TRUE(l->ReanchorSession("s-b", 7, 8, "boot-2").ok());
  auto b = l->GetSession("s-b");
  EXPECT_EQ(b->utc_anchor_ns, 7);
  EXPECT_EQ(b->mono_anchor_ns, 8);
  EXPECT_EQ(b->boot_id, "boot-2");
}

TYPED_TEST(LedgerBackendTest, AReceiptIsKeptPerSessionAndReplaced) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-r")).ok());
  auto none = l->GetReceipt("s-r");
  ASSERT_TRUE(none.ok()) << none.status().message();
  EXPECT_FALSE(none->has_value());
  v1::Receipt r;
  r.set_session_id("s-r");
  r.set_last_sequence(3);
  r.set_head_hash(std::string(32, '\x01'));
  r.set_chain_version(2);
  r.set_signed_utc("2026-12-03T10:15:02.123456789Z");
  r.set_message(std::string("bytes\0signed", 12));  // a NUL survives (bytea / BLOB)
  r.set_signature(std::string(64, '\xfe'));
  r.set_public_key_sha256(std::string(32, '\x7f'));
  ASSERT_TRUE(l->PutReceipt(r, "-----BEGIN PUBLIC KEY-----").ok());
  r.set_last_sequence(4);  // a second close of the same session replaces it
  ASSERT_TRUE(l->PutReceipt(r, "-----BEGIN PUBLIC KEY-----").ok());
  auto got = l->GetReceipt("s-r");
  ASSERT_TRUE(got.ok()) << got.status().message();
  ASSERT_TRUE(got->has_value());
  EXPECT_EQ((*got)->SerializeAsString(), r.SerializeAsString());
}

TYPED_TEST(LedgerBackendTest, TokensAreFoundByHashAndRevoked) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  TokenRow t;
  t.id = "t-1";
  t.session_id = "s-a";
  t.role = v1::ROLE_TRAINER;
  t.subject = "ava";
  t.hash = std::string(32, 'h');
  ASSERT_TRUE(l->PutToken(t).ok());
  TokenRow op;
  op.id = "t-op";
  op.role = v1::ROLE_ADMIN;
  op.hash = std::string(32, '\0');  // bytes, not text: a zero byte must survive
  ASSERT_TRUE(l->PutToken(op).ok());
  auto found = l->FindTokenByHash(std::string(32, 'h'));
  ASSERT_TRUE(found.ok());
  EXPECT_EQ(found->subject, "ava");
  EXPECT_EQ(found->role, v1::ROLE_TRAINER);
  auto admin = l->FindTokenByHash(std::string(32, '\0'));
  ASSERT_TRUE(admin.ok());
  EXPECT_EQ(admin->session_id, "");
  EXPECT_TRUE(absl::IsNotFound(l->FindTokenByHash(std::string(32, 'x')).status()));
  EXPECT_TRUE(absl::IsNotFound(l->RevokeToken("s-other", "t-1").status()));
  auto revoked = l->RevokeToken("s-a", "t-1");
  ASSERT_TRUE(revoked.ok());
  EXPECT_TRUE(revoked->revoked);
  EXPECT_EQ(l->ListTokens("s-a")->size(), 1u);
}

TYPED_TEST(LedgerBackendTest, ANewerSchemaIsRefused) {
  this->ledger_.reset();
  this->backend_.MarkNewerSchema();
  auto l = this->backend_.Open();
  EXPECT_EQ(l.status().code(), absl::StatusCode::kFailedPrecondition) << l.status();
}

TYPED_TEST(LedgerBackendTest, CommitCallbacksRunInSequenceOrderUnderConcurrentAppends) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  std::mutex mu;
  std::vector<uint64_t> seen;
  std::vector<std::thread> threads;
  for (int t = 0; t < 4; ++t) {
    threads.emplace_back([&, t] {
      for (uint64_t i = 1; i <= 200; ++i) {
        ASSERT_TRUE(l->Append("s-a", {FeedbackRecord("c" + std::to_string(t), i, 1)},
                              [&](const absl::Status& s, const std::vector<v1::Record>& rs) {
                                ASSERT_TRUE(s.ok()) << s;
                                std::lock_guard<std::mutex> lock(mu);
                                seen.push_back(rs[0].sequence());
                              })
                        .ok());
      }
    });
  }
  for (auto& th : threads) th.join();
  ASSERT_TRUE(l->Flush().ok());
  ASSERT_EQ(seen.size(), 800u);
  for (size_t i = 0; i < seen.size(); ++i) EXPECT_EQ(seen[i], i + 1);
  ExpectChainVerifies(l, "s-a", 800);
}

TYPED_TEST(LedgerBackendTest, CalibrationEventsAndTheIndex) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  auto event = [](uint64_t cseq, const std::string& run) {
    v1::Record r;
    auto* e = r.mutable_calibration_event();
    e->set_client_id("keys:ava:1");
    e->set_client_sequence(cseq);
    e->set_trainer("ava");
    e->set_run(run);
    e->set_kind(v1::CalibrationEvent::KIND_MOVE);
    return r;
  };
  auto calibration = [](const std::string& id, uint64_t cseq, int64_t written) {
    v1::Record r;
    r.set_written_session_ns(written);
    auto* c = r.mutable_calibration();
    c->set_id(id);
    c->set_trainer("ava");
    c->set_client_id("keys:ava:1");
    c->set_client_sequence(cseq);
    c->add_fits()->set_family("gamma");
    c->set_chosen(0);
    c->set_kernel_description("gamma:2,0.3");
    c->set_source_kind(v1::SOURCE_KIND_TERMINAL);
    return r;
  };
  this->AppendSync("s-a", {event(1, "run-1"), event(2, "run-2"), event(3, "run-1"),
                           calibration("c-1", 4, 100), calibration("c-2", 5, 200)});
  auto events = l->ReadCalibrationEvents("s-a", "keys:ava:1", "run-1");
  ASSERT_TRUE(events.ok());
  ASSERT_EQ(events->size(), 2u);
  EXPECT_EQ((*events)[1].calibration_event().client_sequence(), 3u);
  auto list = l->ListCalibrations("ava");
  ASSERT_TRUE(list.ok());
  ASSERT_EQ(list->size(), 2u);
  EXPECT_EQ((*list)[0].id, "c-2");  // newest first
  EXPECT_EQ((*list)[0].family, "gamma");
  EXPECT_EQ((*list)[0].source_kind, v1::SOURCE_KIND_TERMINAL);
  EXPECT_EQ(l->GetCalibration("c-1")->calibration().id(), "c-1");
  EXPECT_TRUE(absl::IsNotFound(l->GetCalibration("c-9").status()));
  auto latest = l->LatestCalibration("ava");
  ASSERT_TRUE(latest.ok() && latest->has_value());
  EXPECT_EQ((*latest)->calibration().id(), "c-2");
  EXPECT_FALSE(l->LatestCalibration("bo")->has_value());
}

TYPED_TEST(LedgerBackendTest, DerivedAndTimeSetsLieOutsideTheChain) {
  Ledger* l = this->ledger_.get();
  ASSERT_TRUE(l->CreateSession(Session("s-a")).ok());
  auto recs = this->AppendSync("s-a", {FeedbackRecord("c1", 1, 1)});
  v1::Record credit;
  credit.mutable_credit()->set_feedback_sequence(1);
  credit.mutable_credit()->set_trainer("ava");
  ASSERT_TRUE(l->PutDerivedSet("s-a", "replay-1", "{}", {credit}, false).ok());
  EXPECT_TRUE(absl::IsAlreadyExists(l->PutDerivedSet("s-a", "replay-1", "{}", {credit}, false)));
  EXPECT_TRUE(l->PutDerivedSet("s-a", "replay-1", "{}", {credit, credit}, true).ok());
  TimeSetRow set;
  set.id = "ts-1";
  set.session_id = "s-a";
  set.method = "two-sided probe bounds";
  set.parameters = "{}";
  set.through_sequence = 1;
  set.head_hash = recs[0].hash();
  set.events = 1;
  DerivedTimeRow t;
  t.sequence = 1;
  t.kind = "feedback";
  t.client_id = "c1";
  t.event_session_ns = 1990;
  t.outcome = "retimed";
  ASSERT_TRUE(l->PutTimeSet(set, {t}).ok());
  EXPECT_TRUE(absl::IsAlreadyExists(l->PutTimeSet(set, {t})));
  set.id = "ts-2";
  ASSERT_TRUE(l->PutTimeSet(set, {}).ok());
  auto sets = l->ListTimeSets("s-a");
  ASSERT_TRUE(sets.ok());
  ASSERT_EQ(sets->size(), 2u);
  EXPECT_EQ((*sets)[0].id, "ts-2");  // newest first
  auto got = l->GetTimeSet("ts-1");
  ASSERT_TRUE(got.ok());
  EXPECT_EQ(got->head_hash, recs[0].hash());
  EXPECT_EQ(got->created_utc.size(), 24u);  // 2026-01-02T03:04:05.678Z
  auto times = l->ReadDerivedTimes("ts-1");
  ASSERT_TRUE(times.ok());
  ASSERT_EQ(times->size(), 1u);
  EXPECT_EQ((*times)[0].event_session_ns, 1990);
  ExpectChainVerifies(l, "s-a", 1);
}

// ---------------------------------------------------------------- PostgreSQL only
#ifndef TICKMARK_LEDGER_SQLITE_ONLY

class PostgresLeaseTest : public ::testing::Test {
 protected:
  void SetUp() override {
    std::string why;
    server_ = Postgres(&why);
    if (server_ == nullptr) GTEST_SKIP() << "PostgreSQL not available: " << why;
    url_ = server_->NewDatabase();
    db_ = url_.substr(url_.rfind('/') + 1);
  }
  std::unique_ptr<PostgresLedger> Instance(const std::string& name) {
    PostgresLedger::Options o;
    o.conninfo = url_;
    o.leases = true;
    o.instance_id = name;
    o.advertise = name + ".example:7461";
    o.lease = std::chrono::milliseconds(60'000);  // expiry is forced by hand below
    auto l = PostgresLedger::Open(o);
    EXPECT_TRUE(l.ok()) << l.status();
    return l.ok() ? std::move(*l) : nullptr;
  }
  PgServer* server_ = nullptr;
  std::string url_, db_;
};

TEST_F(PostgresLeaseTest, OneOwnerAtATimeAndAFencedOwnerCannotWrite) {
  auto a = Instance("a");
  auto b = Instance("b");
  ASSERT_TRUE(a && b);
  std::mutex mu;
  std::vector<std::string> lost_by_a;
  a->SetLeaseLostHandler([&](const std::string& s, const std::string& owner) {
    std::lock_guard<std::mutex> lock(mu);
    lost_by_a.push_back(s + "@" + owner);
  });
  ASSERT_TRUE(a->CreateSession(Session("s-a")).ok());
  auto la = a->AcquireSession("s-a");
  ASSERT_TRUE(la.ok() && la->owned);
  EXPECT_EQ(la->token, 1u);
  EXPECT_TRUE(AppendAndWait(a.get(), "s-a", {FeedbackRecord("c1", 1, 1)}).status.ok());

  // B is refused while A's lease runs, and told where A is.
  auto lb = b->AcquireSession("s-a");
  ASSERT_TRUE(lb.ok());
  EXPECT_FALSE(lb->owned);
  EXPECT_EQ(lb->owner_address, "a.example:7461");
  EXPECT_TRUE(
      absl::IsUnavailable(AppendAndWait(b.get(), "s-a", {FeedbackRecord("c2", 1, 1)}).status));
  EXPECT_TRUE(absl::IsNotFound(b->AcquireSession("s-none").status()));

  // A stops renewing (paused); its lease runs out; B takes over with a new
  // fencing token and continues A's chain.
  server_->Psql(db_, "UPDATE session_lease SET expires_at = now() - interval '1 second'");
  lb = b->AcquireSession("s-a");
  ASSERT_TRUE(lb.ok());
  ASSERT_TRUE(lb->owned);
  EXPECT_EQ(lb->token, 2u);
  auto by_b = AppendAndWait(b.get(), "s-a", {FeedbackRecord("c2", 1, 1)});
  ASSERT_TRUE(by_b.status.ok()) << by_b.status;
  EXPECT_EQ(by_b.records[0].sequence(), 2u);

  // A wakes up and writes: the fencing check refuses it, nothing is stored,
  // and A learns it lost the session.
  auto late = AppendAndWait(a.get(), "s-a", {FeedbackRecord("c1", 2, 1)});
  EXPECT_TRUE(absl::IsUnavailable(late.status)) << late.status;
  {
    std::lock_guard<std::mutex> lock(mu);
    ASSERT_EQ(lost_by_a.size(), 1u);
    EXPECT_EQ(lost_by_a[0], "s-a@b.example:7461");
  }
  // In the database (psql, outside the ledger): two records, the second
  // written under B's token, and nothing of A's after the takeover.
  EXPECT_EQ(server_->Psql(db_,
                          "SELECT string_agg(seq || ':' || lease_token || ':' || client_id, ',' "
                          "ORDER BY seq) FROM record WHERE session_id = 's-a'"),
            "1:1:c1,2:2:c2");
  EXPECT_EQ(server_->Psql(db_, "SELECT owner || ' ' || token FROM session_lease"), "b 2");
  ExpectChainVerifies(b.get(), "s-a", 2);
  // A may take it back only after B's lease runs out, with token 3.
  auto again = a->AcquireSession("s-a");
  ASSERT_TRUE(again.ok());
  EXPECT_FALSE(again->owned);
}

#endif  // TICKMARK_LEDGER_SQLITE_ONLY

}  // namespace
}  // namespace tickmark::ledger

// The SQLite ledger on its own: sequences, hash chain, reads, dedup
// lookups, sessions, tokens, migrations, reopening.
#include "server/ledger/sqlite/sqlite_ledger.h"
#include "tests/ledger/ledger_test_util.h"

#include <sqlite3.h>

#include <filesystem>
#include <future>
#include <limits>

#include <gtest/gtest.h>

namespace tickmark::ledger {
namespace {

namespace v1 = tickmark::v1;

SqliteLedger::Options Options(const std::string& path) {
  SqliteLedger::Options o;
  o.path = path;
  return o;
}

class LedgerTest : public ::testing::Test {
 protected:
  void SetUp() override {
    std::string tmpl = (std::filesystem::temp_directory_path() / "tm-ledger-XXXXXX").string();
    dir_ = mkdtemp(tmpl.data());
    path_ = dir_ + "/t.db";
    Reopen();
  }
  void TearDown() override {
    ledger_.reset();
    std::filesystem::remove_all(dir_);
  }
  void Reopen() {
    ledger_.reset();
    auto l = SqliteLedger::Open(Options(path_));
    ASSERT_TRUE(l.ok()) << l.status().message();
    ledger_ = std::move(*l);
  }
  static SessionRow Session(const std::string& id) { return testing::Session(id); }
  static v1::Record FeedbackRecord(const std::string& client, uint64_t cseq, double value) {
    return testing::FeedbackRecord(client, cseq, value);
  }
  // Appends and waits for the commit; returns the committed records.
  std::vector<v1::Record> AppendSync(const std::string& session, std::vector<v1::Record> records) {
    std::promise<std::vector<v1::Record>> done;
    auto f = done.get_future();
    auto first = ledger_->Append(session, std::move(records),
                                 [&done](const absl::Status& s, const std::vector<v1::Record>& rs) {
                                   EXPECT_TRUE(s.ok()) << s.message();
                                   done.set_value(rs);
                                 });
    EXPECT_TRUE(first.ok()) << first.status().message();
    return f.get();
  }

  std::string dir_, path_;
  std::unique_ptr<SqliteLedger> ledger_;
};

TEST_F(LedgerTest, SequencesAreConsecutivePerSessionAndSurviveReopen) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  ASSERT_TRUE(ledger_->CreateSession(Session("s-b")).ok());
  auto a = AppendSync("s-a", {FeedbackRecord("c1", 1, 1), FeedbackRecord("c1", 2, -1)});
  auto b = AppendSync("s-b", {FeedbackRecord("c1", 1, 1)});
  EXPECT_EQ(a[0].sequence(), 1u);
  EXPECT_EQ(a[1].sequence(), 2u);
  EXPECT_EQ(b[0].sequence(), 1u);
  EXPECT_EQ(ledger_->CommittedSequence("s-a"), 2u);
  Reopen();
  EXPECT_EQ(ledger_->CommittedSequence("s-a"), 2u);
  auto more = AppendSync("s-a", {FeedbackRecord("c1", 3, 0.5)});
  EXPECT_EQ(more[0].sequence(), 3u);
  // The chain continues from the record before the reopen.
  EXPECT_EQ(more[0].hash(), *ChainHash(a[1].hash(), more[0]));
}

TEST_F(LedgerTest, HashChainRecomputesFromStoredRecords) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  for (uint64_t i = 1; i <= 20; ++i) AppendSync("s-a", {FeedbackRecord("c", i, 1)});
  auto all = ledger_->Read("s-a", 1, 100);
  ASSERT_TRUE(all.ok());
  ASSERT_EQ(all->size(), 20u);
  std::string prev(32, '\0');  // the first record chains from 32 zero bytes
  for (const auto& r : *all) {
    EXPECT_EQ(r.hash(), *ChainHash(prev, r)) << "seq " << r.sequence();
    prev = r.hash();
  }
  // Changing any field breaks the chain at that record.
  v1::Record tampered = (*all)[5];
  tampered.mutable_feedback()->set_value(-1);
  EXPECT_NE(tampered.hash(), *ChainHash((*all)[4].hash(), tampered));
}

TEST_F(LedgerTest, ReadFromTheMiddleAndLimit) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  for (uint64_t i = 1; i <= 10; ++i) AppendSync("s-a", {FeedbackRecord("c", i, 1)});
  auto part = ledger_->Read("s-a", 4, 3);
  ASSERT_TRUE(part.ok());
  ASSERT_EQ(part->size(), 3u);
  EXPECT_EQ((*part)[0].sequence(), 4u);
  EXPECT_EQ((*part)[2].sequence(), 6u);
  EXPECT_EQ((*part)[0].feedback().client_sequence(), 4u);
  auto none = ledger_->Read("s-a", 11, 3);
  ASSERT_TRUE(none.ok());
  EXPECT_TRUE(none->empty());
}

TEST_F(LedgerTest, ClientSequenceLookups) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  AppendSync("s-a", {FeedbackRecord("c1", 1, 1), FeedbackRecord("c1", 5, 1),
                     FeedbackRecord("c2", 2, 1)});
  auto found = ledger_->FindClientSequence("s-a", "c1", 5);
  ASSERT_TRUE(found.ok());
  ASSERT_TRUE(found->has_value());
  EXPECT_EQ(**found, 2u);
  auto missing = ledger_->FindClientSequence("s-a", "c1", 3);
  ASSERT_TRUE(missing.ok());
  EXPECT_FALSE(missing->has_value());
  EXPECT_EQ(*ledger_->LastClientSequence("s-a", "c1"), 5u);
  EXPECT_EQ(*ledger_->LastClientSequence("s-a", "c3"), 0u);
}

TEST_F(LedgerTest, DuplicateClientSequenceIsRefusedByTheSchema) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  AppendSync("s-a", {FeedbackRecord("c1", 1, 1)});
  // The server never sends this (it deduplicates first); the unique index is
  // the last line of defence. Only that append fails: the ledger goes on.
  std::promise<absl::Status> done;
  ASSERT_TRUE(ledger_->Append("s-a", {FeedbackRecord("c1", 1, 1)},
                              [&](const absl::Status& s, const auto&) { done.set_value(s); })
                  .ok());
  EXPECT_TRUE(absl::IsAlreadyExists(done.get_future().get()));
  EXPECT_TRUE(ledger_->WriteHealth().ok());
  auto next = AppendSync("s-a", {FeedbackRecord("c1", 2, 1)});
  EXPECT_EQ(next[0].sequence(), 2u);  // the failed append's sequence is reused
}

// The label's parts column is JSON made by SQLite's json functions: any
// trainer name round-trips, numbers keep every bit, and a non-finite number
// becomes null (the old hand-written JSON printed `inf`, which no JSON
// reader accepts).
TEST_F(LedgerTest, LabelPartsColumnIsValidJsonForAnyTrainerName) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  const std::string tricky = "ava \"the\\ one\"\n\t\x01 \xc3\xa9";
  v1::Record label;
  auto* l = label.mutable_label();
  l->set_step_sequence(1);
  l->set_agent("rover");
  auto* p = l->add_parts();
  p->set_trainer(tricky);
  p->set_value(0.1);
  p->set_weight(1.0 / 3.0);
  auto* q = l->add_parts();
  q->set_trainer("bo");
  q->set_value(std::numeric_limits<double>::infinity());
  q->set_weight(1);
  AppendSync("s-a", {label});
  ledger_.reset();
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open(path_.c_str(), &db), SQLITE_OK);
  sqlite3_stmt* st = nullptr;
  ASSERT_EQ(sqlite3_prepare_v2(db,
                               "SELECT json_valid(parts), json_extract(parts, '$[0].trainer'), "
                               "json_extract(parts, '$[0].value'), json_extract(parts, "
                               "'$[0].weight'), json_type(parts, '$[1].value') FROM label",
                               -1, &st, nullptr),
            SQLITE_OK);
  ASSERT_EQ(sqlite3_step(st), SQLITE_ROW);
  EXPECT_EQ(sqlite3_column_int(st, 0), 1);
  EXPECT_EQ(std::string(reinterpret_cast<const char*>(sqlite3_column_text(st, 1))), tricky);
  EXPECT_EQ(sqlite3_column_double(st, 2), 0.1);
  EXPECT_EQ(sqlite3_column_double(st, 3), 1.0 / 3.0);
  EXPECT_EQ(std::string(reinterpret_cast<const char*>(sqlite3_column_text(st, 4))), "null");
  sqlite3_finalize(st);
  sqlite3_close(db);
}

TEST_F(LedgerTest, CountsByKind) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  v1::Record marker;
  marker.mutable_marker()->set_text("block 2 starts");
  v1::Record step;
  step.mutable_step()->set_client_id("agent-1");
  step.mutable_step()->set_client_sequence(1);
  step.mutable_step()->set_start_agent_ns(10);
  AppendSync("s-a", {FeedbackRecord("c1", 1, 1), FeedbackRecord("c1", 2, 1), marker, step});
  auto c = ledger_->Counts("s-a");
  ASSERT_TRUE(c.ok());
  EXPECT_EQ(c->feedback, 2u);
  EXPECT_EQ(c->markers, 1u);
  EXPECT_EQ(c->steps, 1u);
}

TEST_F(LedgerTest, SessionsOpenCloseAndList) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  ASSERT_TRUE(ledger_->CreateSession(Session("s-b")).ok());
  EXPECT_FALSE(ledger_->CreateSession(Session("s-a")).ok());
  ASSERT_TRUE(ledger_->CloseSession("s-a", 99).ok());
  EXPECT_TRUE(absl::IsNotFound(ledger_->CloseSession("s-zz", 99)));
  auto open = ledger_->ListSessions(false);
  ASSERT_TRUE(open.ok());
  ASSERT_EQ(open->size(), 1u);
  EXPECT_EQ((*open)[0].id, "s-b");
  auto all = ledger_->ListSessions(true);
  ASSERT_EQ(all->size(), 2u);
  auto a = ledger_->GetSession("s-a");
  ASSERT_TRUE(a.ok());
  EXPECT_FALSE(a->open);
  EXPECT_EQ(a->closed_session_ns, 99);
  EXPECT_TRUE(absl::IsNotFound(ledger_->GetSession("s-zz").status()));
}

TEST_F(LedgerTest, TokensAreFoundByHashAndRevoked) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  TokenRow t;
  t.id = "t-1";
  t.session_id = "s-a";
  t.role = v1::ROLE_TRAINER;
  t.subject = "ava";
  t.hash = std::string(32, 'h');
  ASSERT_TRUE(ledger_->PutToken(t).ok());
  auto found = ledger_->FindTokenByHash(std::string(32, 'h'));
  ASSERT_TRUE(found.ok());
  EXPECT_EQ(found->subject, "ava");
  EXPECT_EQ(found->role, v1::ROLE_TRAINER);
  EXPECT_TRUE(absl::IsNotFound(ledger_->FindTokenByHash(std::string(32, 'x')).status()));
  EXPECT_TRUE(absl::IsNotFound(ledger_->RevokeToken("s-other", "t-1").status()));
  auto revoked = ledger_->RevokeToken("s-a", "t-1");
  ASSERT_TRUE(revoked.ok());
  EXPECT_TRUE(revoked->revoked);
  EXPECT_EQ(ledger_->ListTokens("s-a")->size(), 1u);
}

TEST_F(LedgerTest, MigrationsAreRecordedAndANewerSchemaIsRefused) {
  ledger_.reset();
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open(path_.c_str(), &db), SQLITE_OK);
  sqlite3_stmt* q = nullptr;
  ASSERT_EQ(sqlite3_prepare_v2(db, "SELECT MAX(version) FROM schema_migrations", -1, &q, nullptr),
            SQLITE_OK);
  ASSERT_EQ(sqlite3_step(q), SQLITE_ROW);
  EXPECT_GE(sqlite3_column_int(q, 0), 1);
  sqlite3_finalize(q);
  ASSERT_EQ(sqlite3_exec(db, "INSERT INTO schema_migrations (version, description) VALUES (999, 'x')",
                         nullptr, nullptr, nullptr),
            SQLITE_OK);
  sqlite3_close(db);
  auto l = SqliteLedger::Open(Options(path_));
  EXPECT_EQ(l.status().code(), absl::StatusCode::kFailedPrecondition);
}

TEST_F(LedgerTest, CommitCallbacksRunInSequenceOrderUnderConcurrentAppends) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  std::mutex mu;
  std::vector<uint64_t> seen;
  std::vector<std::thread> threads;
  for (int t = 0; t < 4; ++t) {
    threads.emplace_back([&, t] {
      for (uint64_t i = 1; i <= 200; ++i) {
        ASSERT_TRUE(ledger_
                        ->Append("s-a", {FeedbackRecord("c" + std::to_string(t), i, 1)},
                                 [&](const absl::Status& s, const std::vector<v1::Record>& rs) {
                                   ASSERT_TRUE(s.ok());
                                   std::lock_guard<std::mutex> lock(mu);
                                   seen.push_back(rs[0].sequence());
                                 })
                        .ok());
      }
    });
  }
  for (auto& th : threads) th.join();
  ASSERT_TRUE(ledger_->Flush().ok());
  ASSERT_EQ(seen.size(), 800u);
  for (size_t i = 0; i < seen.size(); ++i) EXPECT_EQ(seen[i], i + 1);
}

}  // namespace
}  // namespace tickmark::ledger

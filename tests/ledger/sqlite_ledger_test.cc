// The SQLite ledger's own parts: the schema's unique client key, the label
// JSON column, recorded migrations. The contract every backend keeps
// (sequences, chain, reads, dedup lookups, sessions, tokens, concurrent
// appends) is tests/ledger/ledger_backends_test.cc, run on SQLite too.
#include "server/ledger/sqlite/sqlite_ledger.h"

#include <gtest/gtest.h>
#include <sqlite3.h>

#include <algorithm>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <future>
#include <limits>

#include "tests/ledger/ledger_test_util.h"

namespace tickmark::ledger {
namespace {

namespace v1 = tickmark::v1;

SqliteLedger::Options Options(const std::string& path) {
  SqliteLedger::Options o;
  o.path = path;
  return o;
}

class LedgerTest : public testing::SqliteLedgerTest {
 protected:
  static SessionRow Session(const std::string& id) { return testing::Session(id); }
  static v1::Record FeedbackRecord(const std::string& client, uint64_t cseq, double value) {
    return testing::FeedbackRecord(client, cseq, value);
  }
};

TEST_F(LedgerTest, DuplicateClientSequenceIsRefusedByTheSchema) {
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  AppendSync("s-a", {FeedbackRecord("c1", 1, 1)});
  // The server never sends this (it deduplicates first); the unique index is
  // the last line of defence. Only that append fails: the ledger goes on.
  std::promise<absl::Status> done;
  ASSERT_TRUE(ledger_
                  ->Append("s-a", {FeedbackRecord("c1", 1, 1)},
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
  ASSERT_EQ(
      sqlite3_exec(db, "INSERT INTO schema_migrations (version, description) VALUES (999, 'x')",
                   nullptr, nullptr, nullptr),
      SQLITE_OK);
  sqlite3_close(db);
  auto l = SqliteLedger::Open(Options(path_));
  EXPECT_EQ(l.status().code(), absl::StatusCode::kFailedPrecondition);
}

// The WAL's checkpoint sequence number: a big-endian u32 at byte 12 of the
// -wal file, counted up each time the WAL starts again from its beginning
// (SQLite docs: "Database File Format", 4.1 WAL File Format).
uint32_t WalCheckpointSequence(const std::string& wal) {
  std::ifstream in(wal, std::ios::binary);
  unsigned char h[16] = {};
  in.read(reinterpret_cast<char*>(h), sizeof h);
  return (uint32_t{h[12]} << 24) | (uint32_t{h[13]} << 16) | (uint32_t{h[14]} << 8) | h[15];
}

// The WAL is copied into the database file while the ledger runs (by the
// Checkpointer's thread, mostly, not the writer) and starts again from its
// beginning rather than growing with everything ever written. Written: 6000
// records of 3 KB, over 12000 WAL pages, several times
// the restart size set here. The sqlite3 CLI (Debian's sqlite3, an outside
// reader) then finds every record and an intact file while the ledger is open.
TEST_F(LedgerTest, TheWalIsCopiedWhileRunningAndStartsAgain) {
  // Sizes small enough for a test's data (defaults: 16000 and 32000 pages).
  constexpr int kRestart = 2000, kBackstop = 4000;
  ledger_.reset();
  SqliteLedger::Options o = Options(path_);
  o.wal_restart_pages = kRestart;
  o.wal_backstop_pages = kBackstop;
  auto reopened = SqliteLedger::Open(o);
  ASSERT_TRUE(reopened.ok()) << reopened.status().message();
  ledger_ = std::move(*reopened);
  ASSERT_TRUE(ledger_->CreateSession(Session("s-wal")).ok());
  const std::string wal = path_ + "-wal";
  const uint32_t restarts_before = WalCheckpointSequence(wal);
  constexpr int kAppends = 60, kPerAppend = 100;
  for (int i = 0; i < kAppends; ++i) {
    std::vector<v1::Record> batch;
    for (int j = 0; j < kPerAppend; ++j) batch.push_back(testing::MarkerRecord(3000));
    ASSERT_EQ(AppendSync("s-wal", std::move(batch)).size(), static_cast<size_t>(kPerAppend));
  }
  std::error_code ec;
  const uintmax_t db_bytes = std::filesystem::file_size(path_, ec);
  // The WAL's high-water mark: frames of a 24-byte header and one 4096-byte
  // page after a 32-byte file header (the same section of the SQLite docs).
  // The backstop is checked after each commit and a thread's checkpoint in
  // progress makes the writer's return busy, so a few commits may pass it:
  // within twice the backstop.
  const uintmax_t wal_bytes = std::filesystem::file_size(wal, ec);
  EXPECT_LE(wal_bytes, uintmax_t{32} + uintmax_t{2 * kBackstop} * (24 + 4096));
  const uint32_t restarts = WalCheckpointSequence(wal) - restarts_before;
  // 6000 records of >= 6 KB in rows (journal body and marker text): ~36 MB.
  EXPECT_GT(db_bytes, uintmax_t{20} << 20) << "little was copied into the file while open";
  EXPECT_GE(restarts, 2u) << "the WAL did not start again";
  // The copying was the thread's: it copied most of the frames (about 85%
  // here; the writer only finishes a WAL before it starts again, or copies
  // past the backstop). Each restart follows a checkpoint that copied the
  // whole WAL: mostly the writer's finish, sometimes the thread's own pass
  // when it caught up between two commits (the next write then starts the
  // WAL again; SQLite docs: "Write-Ahead Logging", checkpoint starvation).
  const SqliteLedger::WalCheckpoints runs = ledger_->wal_checkpoints();
  EXPECT_GT(runs.background_frames, runs.writer_frames) << "the writer did the copying";
  EXPECT_GE(runs.background + runs.writer, restarts) << "a restart without a checkpoint";
  EXPECT_EQ(testing::Sqlite3Cli(path_, "SELECT count(*) FROM marker"), "6000\n");
  EXPECT_EQ(testing::Sqlite3Cli(path_, "PRAGMA integrity_check"), "ok\n");
  std::printf(
      "database file %.1f MiB while open; WAL file %.1f MiB; it started again %u times; "
      "checkpoints: %llu by the thread (%llu frames), %llu by the writer (%llu frames)\n",
      static_cast<double>(db_bytes) / 1048576.0, static_cast<double>(wal_bytes) / 1048576.0,
      restarts, static_cast<unsigned long long>(runs.background),
      static_cast<unsigned long long>(runs.background_frames),
      static_cast<unsigned long long>(runs.writer),
      static_cast<unsigned long long>(runs.writer_frames));
}

}  // namespace
}  // namespace tickmark::ledger

// Helpers shared by the ledger tests: temporary folders, records, appends
// that wait for their commit (with a deadline, never forever), a chain
// check that recomputes every hash, a fixture with a fresh SQLite ledger and
// the sqlite3 command-line tool as an outside reader of its file.
#ifndef TICKMARK_TESTS_LEDGER_LEDGER_TEST_UTIL_H_
#define TICKMARK_TESTS_LEDGER_LEDGER_TEST_UTIL_H_

#include <gtest/gtest.h>

#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <future>
#include <memory>
#include <string>
#include <vector>

#include "server/ledger/sqlite/sqlite_ledger.h"

namespace tickmark::ledger::testing {

namespace v1 = tickmark::v1;

inline std::string MakeTempDir(const char* stem) {
  std::string tmpl =
      (std::filesystem::temp_directory_path() / (std::string(stem) + "-XXXXXX")).string();
  return mkdtemp(tmpl.data());
}

inline SessionRow Session(const std::string& id) {
  SessionRow row;
  row.id = id;
  row.title = "t";
  row.opened_session_ns = 1000;
  row.utc_anchor_ns = 1000;
  row.mono_anchor_ns = 5;
  return row;
}

inline v1::Record FeedbackRecord(const std::string& client, uint64_t cseq, double value) {
  v1::Record r;
  r.set_written_session_ns(2000 + static_cast<int64_t>(cseq));
  auto* f = r.mutable_feedback();
  f->set_client_id(client);
  f->set_client_sequence(cseq);
  f->set_trainer("ava");
  f->set_value(value);
  f->set_event_source_ns(7);
  f->set_arrival_session_ns(2000);
  f->set_event_session_ns(1990);
  return r;
}

inline v1::Record MarkerRecord(size_t text_bytes) {
  v1::Record r;
  r.mutable_marker()->set_text(std::string(text_bytes, 'm'));
  r.mutable_marker()->set_author("test");
  return r;
}

// What a commit callback reported.
struct Committed {
  absl::Status status;
  std::vector<v1::Record> records;
};

// Appends and waits (at most 30 s: a ledger that never calls back is a
// hang, reported as a failure rather than a stuck test).
inline Committed AppendAndWait(Ledger* ledger, const std::string& session,
                               std::vector<v1::Record> records) {
  auto done = std::make_shared<std::promise<Committed>>();
  auto f = done->get_future();
  auto first = ledger->Append(session, std::move(records),
                              [done](const absl::Status& s, const std::vector<v1::Record>& rs) {
                                done->set_value(Committed{s, rs});
                              });
  if (!first.ok()) return Committed{first.status(), {}};
  if (f.wait_for(std::chrono::seconds(30)) != std::future_status::ready) {
    ADD_FAILURE() << "commit callback did not run within 30 s (a hang)";
    return Committed{absl::DeadlineExceededError("hang"), {}};
  }
  return f.get();
}

// Every record of the session read back: sequences 1..n without a gap and
// each hash recomputed from the one before.
inline void ExpectChainVerifies(Ledger* ledger, const std::string& session, uint64_t expect_last) {
  auto all = ledger->Read(session, 1, 1'000'000);
  ASSERT_TRUE(all.ok()) << all.status().message();
  ASSERT_EQ(all->size(), expect_last) << "session " << session;
  std::string prev(32, '\0');  // the first record chains from 32 zero bytes
  for (size_t i = 0; i < all->size(); ++i) {
    const v1::Record& r = (*all)[i];
    ASSERT_EQ(r.sequence(), i + 1) << "gap in session " << session;
    auto hash = ChainHash(prev, r);
    ASSERT_TRUE(hash.ok());
    ASSERT_EQ(r.hash(), *hash) << "chain broken at " << r.sequence();
    prev = r.hash();
  }
  EXPECT_EQ(ledger->CommittedSequence(session), expect_last);
}

// Appends, waits for the commit and expects it to succeed; the committed
// records (what the ledger fixtures' AppendSync call).
inline std::vector<v1::Record> AppendOk(Ledger* ledger, const std::string& session,
                                        std::vector<v1::Record> records) {
  Committed c = AppendAndWait(ledger, session, std::move(records));
  EXPECT_TRUE(c.status.ok()) << c.status.message();
  return c.records;
}

// Runs the sqlite3 command-line tool (Debian's sqlite3 package: the outside
// reader of the ledger file) read-only on `db` with one SQL statement; its
// stdout and stderr.
inline std::string Sqlite3Cli(const std::string& db, const std::string& sql) {
  const std::string cmd = "sqlite3 -readonly '" + db + "' \"" + sql + "\" 2>&1";
  std::string out;
  FILE* p = popen(cmd.c_str(), "r");
  if (p == nullptr) return "popen failed";
  char buf[4096];
  size_t n;
  while ((n = fread(buf, 1, sizeof buf, p)) > 0) out.append(buf, n);
  pclose(p);
  return out;
}

// A fresh SQLite ledger in a temporary folder for each test.
class SqliteLedgerTest : public ::testing::Test {
 protected:
  void SetUp() override {
    dir_ = MakeTempDir("tm-ledger");
    path_ = dir_ + "/t.db";
    Reopen();
  }
  void TearDown() override {
    ledger_.reset();
    std::filesystem::remove_all(dir_);
  }
  void Reopen() {
    ledger_.reset();
    SqliteLedger::Options o;
    o.path = path_;
    auto l = SqliteLedger::Open(o);
    ASSERT_TRUE(l.ok()) << l.status().message();
    ledger_ = std::move(*l);
  }
  std::vector<v1::Record> AppendSync(const std::string& session, std::vector<v1::Record> records) {
    return AppendOk(ledger_.get(), session, std::move(records));
  }
  std::string dir_, path_;
  std::unique_ptr<SqliteLedger> ledger_;
};

}  // namespace tickmark::ledger::testing

#endif  // TICKMARK_TESTS_LEDGER_LEDGER_TEST_UTIL_H_

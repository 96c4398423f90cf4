// The ledger's time set tables (migration 4): a retiming's event times are
// stored beside the originals, which stay as they were (the records, their
// typed rows and the hash chain); sets are listed newest first, an id is used
// once, and a set that breaks a constraint leaves nothing behind. The tables
// are read back with Debian's sqlite3 CLI, which shares no code with the
// ledger, and its JSON1 functions check the parameters.
#include <gtest/gtest.h>
#include <stdio.h>

#include <filesystem>
#include <string>

#include "server/ledger/sqlite/sqlite_ledger.h"
#include "tests/ledger/ledger_test_util.h"

namespace tickmark::ledger {
namespace {

namespace v1 = tickmark::v1;
using testing::AppendAndWait;

v1::Record StepRecord(uint64_t cseq) {
  v1::Record r;
  r.set_written_session_ns(3000);
  auto* s = r.mutable_step();
  s->set_client_id("agent-1");
  s->set_client_sequence(cseq);
  s->set_agent("rover");
  s->set_step_id(cseq);
  s->set_start_agent_ns(100);
  s->set_end_agent_ns(200);
  s->set_start_session_ns(2900);
  s->set_end_session_ns(2950);
  s->set_arrival_session_ns(3000);
  s->set_uncertainty_ns(40);
  return r;
}

DerivedTimeRow Row(uint64_t seq, const std::string& kind, int64_t at, int64_t u, int64_t live) {
  DerivedTimeRow t;
  t.sequence = seq;
  t.kind = kind;
  t.client_id = kind == "feedback" ? "keys:ava:1" : "agent-1";
  t.event_session_ns = at;
  t.uncertainty_ns = u;
  t.live_session_ns = live;
  t.live_uncertainty_ns = 40;
  t.outcome = "retimed";
  t.probes = 16;
  return t;
}

class TimeSetLedgerTest : public testing::SqliteLedgerTest {
 protected:
  TimeSetRow Set(const std::string& id, uint64_t through, const std::string& head) {
    TimeSetRow t;
    t.id = id;
    t.session_id = "s-1";
    t.method = "two-sided probe bounds";
    t.parameters = "{\"half_window_s\":30,\"window_probes\":16}";
    t.through_sequence = through;
    t.head_hash = head;
    t.events = 3;
    t.retimed = 2;
    return t;
  }
};

TEST_F(TimeSetLedgerTest, SetsAreStoredBesideTheUntouchedRecords) {
  ASSERT_TRUE(ledger_->CreateSession(testing::Session("s-1")).ok());
  auto committed = AppendAndWait(ledger_.get(), "s-1",
                                 {testing::FeedbackRecord("keys:ava:1", 1, 1),
                                  testing::FeedbackRecord("keys:ava:1", 2, -1), StepRecord(1)});
  ASSERT_TRUE(committed.status.ok());
  const std::string head = committed.records.back().hash();

  ASSERT_TRUE(ledger_
                  ->PutTimeSet(Set("ts-00000001", 3, head), {Row(1, "feedback", 1985, 7, 1990),
                                                             Row(3, "step_start", 2898, 9, 2900),
                                                             Row(3, "step_end", 2951, 9, 2950)})
                  .ok());
  ASSERT_TRUE(
      ledger_->PutTimeSet(Set("ts-00000002", 3, head), {Row(2, "feedback", 1991, 6, 1990)}).ok());
  // An id is used once.
  EXPECT_TRUE(absl::IsAlreadyExists(ledger_->PutTimeSet(Set("ts-00000001", 3, head), {})));
  // A row that breaks a constraint rolls the whole set back.
  EXPECT_FALSE(
      ledger_->PutTimeSet(Set("ts-00000003", 3, head), {Row(1, "frobnicate", 1, 1, 1)}).ok());
  EXPECT_TRUE(absl::IsNotFound(ledger_->GetTimeSet("ts-00000003").status()));
  EXPECT_TRUE(absl::IsNotFound(ledger_->GetTimeSet("ts-nope").status()));

  auto sets = ledger_->ListTimeSets("s-1");
  ASSERT_TRUE(sets.ok());
  ASSERT_EQ(sets->size(), 2u);
  EXPECT_EQ((*sets)[0].id, "ts-00000002");  // newest first
  EXPECT_EQ((*sets)[1].id, "ts-00000001");
  EXPECT_EQ((*sets)[1].head_hash, head);
  EXPECT_EQ((*sets)[1].through_sequence, 3u);
  EXPECT_FALSE((*sets)[1].created_utc.empty());
  EXPECT_TRUE(ledger_->ListTimeSets("s-other")->empty());

  auto rows = ledger_->ReadDerivedTimes("ts-00000001");
  ASSERT_TRUE(rows.ok());
  ASSERT_EQ(rows->size(), 3u);
  EXPECT_EQ((*rows)[0].kind, "feedback");
  EXPECT_EQ((*rows)[0].event_session_ns, 1985);
  EXPECT_EQ((*rows)[1].kind, "step_end");  // by sequence, then kind
  EXPECT_EQ((*rows)[2].kind, "step_start");
  EXPECT_EQ((*rows)[2].live_session_ns, 2900);
  EXPECT_EQ((*rows)[2].probes, 16u);

  // The originals: the same records, hashes and typed rows.
  testing::ExpectChainVerifies(ledger_.get(), "s-1", 3);
  ledger_->Close();

  // The outside reader: Debian's sqlite3 CLI.
  EXPECT_EQ(testing::Sqlite3Cli(path_,
                                "SELECT seq, event_session_ns, uncertainty_ns FROM feedback "
                                "WHERE session_id = 's-1' ORDER BY seq"),
            "1|1990|0\n2|1990|0\n");
  EXPECT_EQ(testing::Sqlite3Cli(path_, "SELECT start_session_ns, end_session_ns FROM step"),
            "2900|2950\n");
  EXPECT_EQ(testing::Sqlite3Cli(path_,
                                "SELECT time_set, seq, kind, client_id, event_session_ns, "
                                "uncertainty_ns, live_session_ns, outcome FROM derived_time "
                                "ORDER BY time_set, seq, kind"),
            "ts-00000001|1|feedback|keys:ava:1|1985|7|1990|retimed\n"
            "ts-00000001|3|step_end|agent-1|2951|9|2950|retimed\n"
            "ts-00000001|3|step_start|agent-1|2898|9|2900|retimed\n"
            "ts-00000002|2|feedback|keys:ava:1|1991|6|1990|retimed\n");
  // SQLite's JSON1 json_extract reads the parameters; the head hash is the
  // hash of the record the set was computed through.
  EXPECT_EQ(
      testing::Sqlite3Cli(path_,
                          "SELECT id, json_extract(parameters, '$.half_window_s'), events, "
                          "retimed, hex(t.head_hash) = hex(r.hash) FROM time_set t JOIN record r "
                          "ON r.session_id = t.session_id AND r.seq = t.through_seq ORDER BY id"),
      "ts-00000001|30|3|2|1\nts-00000002|30|3|2|1\n");
  // Migration 4 (time sets) is applied; later migrations may follow it.
  EXPECT_EQ(testing::Sqlite3Cli(path_, "SELECT COUNT(*) FROM schema_migrations WHERE version = 4"),
            "1\n");
}

TEST_F(TimeSetLedgerTest, ParametersMustBeJson) {
  ASSERT_TRUE(ledger_->CreateSession(testing::Session("s-1")).ok());
  TimeSetRow bad = Set("ts-0000000a", 0, std::string(32, '\0'));
  bad.parameters = "half_window=30";
  EXPECT_FALSE(ledger_->PutTimeSet(bad, {}).ok());
  EXPECT_TRUE(ledger_->ListTimeSets("s-1")->empty());
}

}  // namespace
}  // namespace tickmark::ledger

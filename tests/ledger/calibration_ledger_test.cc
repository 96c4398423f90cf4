// The ledger's calibration tables (migration 3): CalibrationEvent and
// Calibration records go into their typed tables in the same transaction as
// the journal, the server-wide calibration index answers the look-ups, the
// client key of both kinds is deduplicated, and session.pin_kernels and
// kernel_setting.calibration are stored. The typed tables are read back with
// Debian's sqlite3 CLI, which shares no code with the ledger.
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

v1::Record Event(const std::string& client, uint64_t cseq, const std::string& run,
                 v1::CalibrationEvent::Kind kind, uint32_t move, int64_t at_source_ns,
                 bool approve) {
  v1::Record r;
  r.set_written_session_ns(5000 + static_cast<int64_t>(cseq));
  auto* e = r.mutable_calibration_event();
  e->set_client_id(client);
  e->set_client_sequence(cseq);
  e->set_trainer("ava");
  e->set_run(run);
  e->set_kind(kind);
  e->set_move(move);
  e->set_at_source_ns(at_source_ns);
  e->set_approve(approve);
  e->set_practice(move == 1);
  e->set_detail(kind == v1::CalibrationEvent::KIND_MOVE ? "right" : "key:g");
  e->set_at_session_ns(at_source_ns + 10);
  e->set_uncertainty_ns(3);
  e->set_arrival_session_ns(5000 + static_cast<int64_t>(cseq));
  return r;
}

v1::Record CalibrationRecord(const std::string& id, const std::string& trainer, uint64_t cseq,
                             int64_t written_ns) {
  v1::Record r;
  r.set_written_session_ns(written_ns);
  auto* c = r.mutable_calibration();
  c->set_id(id);
  c->set_trainer(trainer);
  c->set_client_id("keys:ava:1");
  c->set_client_sequence(cseq);
  c->set_run("run-1");
  c->set_source_kind(v1::SOURCE_KIND_TERMINAL);
  c->set_valid(41);
  auto* fit = c->add_fits();
  fit->set_family("gamma");
  fit->set_kernel_description("gamma:2,0.3");
  c->set_chosen(0);
  c->set_kernel_description("gamma:2,0.3");
  return r;
}

using CalibrationLedgerTest = testing::SqliteLedgerTest;

TEST_F(CalibrationLedgerTest, EventsCalibrationsAndTheIndex) {
  SessionRow row = testing::Session("s-1");
  row.pin_kernels = true;
  ASSERT_TRUE(ledger_->CreateSession(row).ok());
  ASSERT_TRUE(ledger_->CreateSession(testing::Session("s-2")).ok());
  auto got = ledger_->GetSession("s-1");
  ASSERT_TRUE(got.ok());
  EXPECT_TRUE(got->pin_kernels);
  EXPECT_FALSE(ledger_->GetSession("s-2")->pin_kernels);

  using K = v1::CalibrationEvent;
  std::vector<v1::Record> events = {
      Event("keys:ava:1", 1, "run-1", K::KIND_MOVE, 1, 1'000'000'000, true),
      Event("keys:ava:1", 2, "run-1", K::KIND_ANSWER, 0, 1'400'000'000, true),
      Event("keys:ava:1", 3, "run-2", K::KIND_MOVE, 1, 9'000'000'000, false),
      Event("keys:ava:1", 4, "run-1", K::KIND_MOVE, 2, 2'000'000'000, false),
  };
  ASSERT_TRUE(AppendAndWait(ledger_.get(), "s-1", events).status.ok());
  auto run1 = ledger_->ReadCalibrationEvents("s-1", "keys:ava:1", "run-1");
  ASSERT_TRUE(run1.ok()) << run1.status().message();
  ASSERT_EQ(run1->size(), 3u);
  EXPECT_EQ((*run1)[0].sequence(), 1u);
  EXPECT_EQ((*run1)[1].calibration_event().at_source_ns(), 1'400'000'000);
  EXPECT_EQ((*run1)[2].calibration_event().move(), 2u);
  EXPECT_TRUE(ledger_->ReadCalibrationEvents("s-1", "other", "run-1")->empty());
  // The client key of a calibration event is the dedup key.
  auto dup = AppendAndWait(ledger_.get(), "s-1",
                           {Event("keys:ava:1", 2, "run-1", K::KIND_ANSWER, 0, 5, true)});
  EXPECT_EQ(dup.status.code(), absl::StatusCode::kAlreadyExists) << dup.status.message();

  ASSERT_TRUE(AppendAndWait(ledger_.get(), "s-1", {CalibrationRecord("c-00000001", "ava", 5, 7000)})
                  .status.ok());
  ASSERT_TRUE(AppendAndWait(ledger_.get(), "s-2", {CalibrationRecord("c-00000002", "ava", 1, 8000)})
                  .status.ok());
  ASSERT_TRUE(AppendAndWait(ledger_.get(), "s-2", {CalibrationRecord("c-00000003", "ben", 2, 9000)})
                  .status.ok());
  // The calibration carries its finish's client key: a resent finish is found.
  auto found = ledger_->FindClientSequence("s-1", "keys:ava:1", 5);
  ASSERT_TRUE(found.ok());
  ASSERT_TRUE(found->has_value());
  EXPECT_EQ(**found, 5u);

  auto all = ledger_->ListCalibrations("");
  ASSERT_TRUE(all.ok());
  ASSERT_EQ(all->size(), 3u);
  EXPECT_EQ((*all)[0].id, "c-00000003");  // newest first
  auto ava = ledger_->ListCalibrations("ava");
  ASSERT_EQ(ava->size(), 2u);
  EXPECT_EQ((*ava)[0].id, "c-00000002");
  EXPECT_EQ((*ava)[0].session_id, "s-2");
  EXPECT_EQ((*ava)[1].sequence, 5u);
  EXPECT_EQ((*ava)[1].family, "gamma");
  EXPECT_EQ((*ava)[1].valid, 41u);
  EXPECT_EQ((*ava)[1].source_kind, v1::SOURCE_KIND_TERMINAL);
  EXPECT_FALSE((*ava)[1].warning);

  auto one = ledger_->GetCalibration("c-00000001");
  ASSERT_TRUE(one.ok()) << one.status().message();
  EXPECT_EQ(one->calibration().kernel_description(), "gamma:2,0.3");
  EXPECT_EQ(one->session_id(), "s-1");
  EXPECT_EQ(ledger_->GetCalibration("c-nothere").status().code(), absl::StatusCode::kNotFound);
  auto latest = ledger_->LatestCalibration("ava");
  ASSERT_TRUE(latest.ok());
  ASSERT_TRUE(latest->has_value());
  EXPECT_EQ((*latest)->calibration().id(), "c-00000002");
  EXPECT_FALSE(ledger_->LatestCalibration("cleo")->has_value());

  v1::Record ks;
  ks.set_written_session_ns(9500);
  ks.mutable_kernel()->set_trainer("ava");
  ks.mutable_kernel()->set_description("gamma:2,0.3");
  ks.mutable_kernel()->set_weight(1);
  ks.mutable_kernel()->set_author("calibration");
  ks.mutable_kernel()->set_calibration("c-00000002");
  ASSERT_TRUE(AppendAndWait(ledger_.get(), "s-2", {ks}).status.ok());
  testing::ExpectChainVerifies(ledger_.get(), "s-1", 5);
  ledger_->Close();

  // The outside reader: Debian's sqlite3 CLI.
  EXPECT_EQ(testing::Sqlite3Cli(
                path_,
                "SELECT seq, client_seq, run, kind, move, at_source_ns, approve, practice, "
                "detail FROM calibration_event WHERE session_id = 's-1' ORDER BY seq"),
            "1|1|run-1|move|1|1000000000|1|1|right\n"
            "2|2|run-1|answer|0|1400000000|1|0|key:g\n"
            "3|3|run-2|move|1|9000000000|0|1|right\n"
            "4|4|run-1|move|2|2000000000|0|0|right\n");
  EXPECT_EQ(testing::Sqlite3Cli(
                path_,
                "SELECT id, trainer, session_id, seq, created_session_ns, family, "
                "kernel_description, valid, warning, source_kind FROM calibration ORDER BY id"),
            "c-00000001|ava|s-1|5|7000|gamma|gamma:2,0.3|41|0|terminal\n"
            "c-00000002|ava|s-2|1|8000|gamma|gamma:2,0.3|41|0|terminal\n"
            "c-00000003|ben|s-2|2|9000|gamma|gamma:2,0.3|41|0|terminal\n");
  EXPECT_EQ(testing::Sqlite3Cli(
                path_,
                "SELECT kind, client_id, client_seq FROM record WHERE session_id = 's-1' AND "
                "seq = 5"),
            "calibration|keys:ava:1|5\n");
  EXPECT_EQ(testing::Sqlite3Cli(path_, "SELECT id, pin_kernels FROM session ORDER BY id"),
            "s-1|1\ns-2|0\n");
  EXPECT_EQ(testing::Sqlite3Cli(path_, "SELECT trainer, calibration FROM kernel_setting"),
            "ava|c-00000002\n");
  // Migration 4 (time sets) is applied; later migrations may follow it.
  EXPECT_EQ(testing::Sqlite3Cli(path_, "SELECT COUNT(*) FROM schema_migrations WHERE version = 4"),
            "1\n");
}

}  // namespace
}  // namespace tickmark::ledger

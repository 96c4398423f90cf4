// Start-up is never silent about data: copies of a real ledger written by
// the test are damaged in the ways a crash or an operator can damage them,
// and each is refused with a message that names the file and the way out.
// (The old ledger opened all of them: truncated, empty, deleted beside its
// operator token, or without the WAL that held the last records.)
#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <sqlite3.h>

#include <cstdlib>
#include <fstream>
#include <iostream>

#include "tests/ledger/ledger_test_util.h"

namespace tickmark::ledger {
namespace {

namespace fs = std::filesystem;
using namespace tickmark::ledger::testing;

constexpr uint64_t kCheckpointed = 50;  // records in the main file
constexpr uint64_t kInWal = 250;        // records after them, only in the -wal file

// How a copy of the ledger's folder is spoiled before it is opened.
enum class Spoil {
  kNone,
  kTruncate1234,
  kZeroLength,
  kDeleteKeepToken,
  kDeleteKeepSideFile,
  kDropWal,
  kDamageWal,
  kEmptyFolder,
};

struct StartCase {
  const char* name;
  bool from_live;  // copy taken while the ledger was open (its WAL not checkpointed)
  Spoil spoil;
  bool allow_new = false;
  bool accept_lost = false;
  absl::StatusCode want = absl::StatusCode::kOk;
  std::vector<std::string> message_has = {};  // "$" stands for the ledger's path
  uint64_t want_records = 0;                  // of session s-a, when it opens
};

class LedgerStartupTest : public ::testing::TestWithParam<StartCase> {
 protected:
  static void SetUpTestSuite() {
    root_ = new std::string(MakeTempDir("tm-startup"));
    const std::string closed = *root_ + "/closed", live = *root_ + "/live";
    fs::create_directories(closed);
    fs::create_directories(live);
    // A real ledger: records 1..50 checkpointed by a clean close, then
    // 51..300 written and committed while the copy "live" is taken.
    SqliteLedger::Options o;
    o.path = *root_ + "/src/tickmark.db";
    fs::create_directories(*root_ + "/src");
    std::ofstream(*root_ + "/src/operator.token") << "tm-op-secret\n";
    {
      auto l = SqliteLedger::Open(o);
      ASSERT_TRUE(l.ok()) << l.status().message();
      ASSERT_TRUE((*l)->CreateSession(Session("s-a")).ok());
      ASSERT_TRUE((*l)->CreateSession(Session("s-b")).ok());
      for (uint64_t i = 1; i <= kCheckpointed; ++i) {
        ASSERT_TRUE(AppendAndWait(l->get(), "s-a", {FeedbackRecord("c1", i, 1)}).status.ok());
      }
      ASSERT_TRUE(AppendAndWait(l->get(), "s-b", {FeedbackRecord("c1", 1, 1)}).status.ok());
    }
    fs::copy(*root_ + "/src", closed);
    auto l = SqliteLedger::Open(o);
    ASSERT_TRUE(l.ok()) << l.status().message();
    for (uint64_t i = kCheckpointed + 1; i <= kCheckpointed + kInWal; ++i) {
      ASSERT_TRUE(AppendAndWait(l->get(), "s-a", {FeedbackRecord("c1", i, 1)}).status.ok());
    }
    ASSERT_TRUE((*l)->Flush().ok());
    ASSERT_TRUE(fs::exists(o.path + "-wal"));
    for (const char* f :
         {"tickmark.db", "tickmark.db-wal", "tickmark.db.heads", "operator.token"}) {
      fs::copy_file(*root_ + "/src/" + f, live + "/" + f);
    }
  }
  static void TearDownTestSuite() {
    fs::remove_all(*root_);
    delete root_;
  }

  static std::string* root_;
};
std::string* LedgerStartupTest::root_ = nullptr;

void SpoilCopy(const std::string& dir, Spoil spoil) {
  const std::string db = dir + "/tickmark.db";
  switch (spoil) {
    case Spoil::kNone:
      break;
    case Spoil::kTruncate1234:
      fs::resize_file(db, fs::file_size(db) - 1234);
      break;
    case Spoil::kZeroLength:
      fs::resize_file(db, 0);
      break;
    case Spoil::kDeleteKeepToken:
      fs::remove(db);
      fs::remove(db + ".heads");
      break;
    case Spoil::kDeleteKeepSideFile:
      fs::remove(db);
      fs::remove(dir + "/operator.token");
      break;
    case Spoil::kDropWal:
      fs::remove(db + "-wal");
      break;
    case Spoil::kDamageWal: {
      // Bytes overwritten in the middle of the WAL: SQLite's frame checksums
      // fail there and it silently ignores that frame and all after it.
      std::fstream wal(db + "-wal", std::ios::in | std::ios::out | std::ios::binary);
      wal.seekp(static_cast<std::streamoff>(fs::file_size(db + "-wal") / 2));
      wal << std::string(64, '\x5a');
      break;
    }
    case Spoil::kEmptyFolder:
      for (const auto& e : fs::directory_iterator(dir)) fs::remove(e.path());
      break;
  }
}

TEST_P(LedgerStartupTest, RefusedWithAClearMessageOrOpened) {
  const StartCase& c = GetParam();
  const std::string dir = *root_ + "/case-" + c.name;
  fs::remove_all(dir);
  fs::copy(*root_ + (c.from_live ? "/live" : "/closed"), dir);
  SpoilCopy(dir, c.spoil);

  SqliteLedger::Options o;
  o.path = dir + "/tickmark.db";
  o.evidence_files = {dir + "/operator.token"};
  o.allow_new_ledger = c.allow_new;
  o.accept_lost_records = c.accept_lost;
  auto l = SqliteLedger::Open(o);
  ASSERT_EQ(l.status().code(), c.want) << l.status().message();
  for (std::string want : c.message_has) {
    for (size_t at; (at = want.find('$')) != std::string::npos;) want.replace(at, 1, o.path);
    EXPECT_NE(l.status().message().find(want), absl::string_view::npos)
        << "message lacks '" << want << "':\n"
        << l.status().message();
  }
  if (!l.ok()) {
    std::cout << "what the operator sees:\n" << l.status().message() << "\n";
    return;
  }
  ExpectChainVerifies(l->get(), "s-a", c.want_records);
  // After an accepted start the side file matches again: a plain reopen works.
  l->reset();
  o.allow_new_ledger = false;
  o.accept_lost_records = false;
  auto again = SqliteLedger::Open(o);
  ASSERT_TRUE(again.ok()) << again.status().message();
}

// The refusal's own recovery commands, run as an operator would (with
// Debian's sqlite3 program), give a ledger that starts again.
TEST_F(LedgerStartupTest, ADamagedLedgerStartsAgainAfterTheRecoveryItsMessageGives) {
  if (std::system("command -v sqlite3 >/dev/null") != 0) {
    GTEST_SKIP() << "no sqlite3 program (Debian package sqlite3) to run the recovery with";
  }
  const std::string dir = *root_ + "/recover";
  fs::remove_all(dir);
  fs::copy(*root_ + "/closed", dir);
  SpoilCopy(dir, Spoil::kTruncate1234);
  SqliteLedger::Options o;
  o.path = dir + "/tickmark.db";
  o.evidence_files = {dir + "/operator.token"};
  ASSERT_EQ(SqliteLedger::Open(o).status().code(), absl::StatusCode::kDataLoss);
  // The commands of DamagedLedger's message.
  const std::string recovered = dir + "/tickmark.recovered.db";
  // It complains about the damaged rows it cannot copy (exit status 1): expected.
  std::system(("sqlite3 " + o.path + " .dump | sqlite3 " + recovered + " 2>/dev/null").c_str());
  ASSERT_TRUE(fs::exists(recovered));
  fs::create_directories(o.path + ".damaged");
  fs::rename(o.path, o.path + ".damaged/tickmark.db");
  fs::rename(recovered, o.path);
  auto l = SqliteLedger::Open(o);
  if (absl::IsDataLoss(l.status())) {  // the recovery lost records, and says which
    std::cout << l.status().message() << "\n";
    o.accept_lost_records = true;
    l = SqliteLedger::Open(o);
  }
  ASSERT_TRUE(l.ok()) << l.status().message();
  EXPECT_TRUE((*l)->GetSession("s-b").ok());
}

// Regression: a small, freshly checkpointed ledger cut by 1,234 bytes lost
// part of a page PRAGMA quick_check never reads (it said "ok"), and tickmarkd
// started on it. The file's length is now checked against its own header.
TEST(LedgerFileLengthTest, ALedgerCutShortIsRefusedEvenWhenQuickCheckPasses) {
  const std::string dir = MakeTempDir("tm-cut");
  SqliteLedger::Options o;
  o.path = dir + "/tickmark.db";
  {
    auto l = SqliteLedger::Open(o);
    ASSERT_TRUE(l.ok()) << l.status().message();
    ASSERT_TRUE((*l)->CreateSession(Session("s-a")).ok());
  }
  const auto size = fs::file_size(o.path);
  ASSERT_GT(size, 1234u);
  fs::resize_file(o.path, size - 1234);
  auto l = SqliteLedger::Open(o);
  EXPECT_EQ(l.status().code(), absl::StatusCode::kDataLoss);
  EXPECT_THAT(std::string(l.status().message()), ::testing::HasSubstr("cut short"));
  EXPECT_THAT(std::string(l.status().message()), ::testing::HasSubstr(".dump"));
  fs::remove_all(dir);
}

using absl::StatusCode;
const uint64_t kAll = kCheckpointed + kInWal;

INSTANTIATE_TEST_SUITE_P(
    Cases, LedgerStartupTest,
    ::testing::Values(
        StartCase{
            "IntactCopy", false, Spoil::kNone, false, false, StatusCode::kOk, {}, kCheckpointed},
        StartCase{
            "IntactCopyWithItsWal", true, Spoil::kNone, false, false, StatusCode::kOk, {}, kAll},
        StartCase{"TruncatedBy1234Bytes",
                  false,
                  Spoil::kTruncate1234,
                  false,
                  false,
                  StatusCode::kDataLoss,
                  {"$", "damaged", "sqlite3 $ .dump | sqlite3", "keep the damaged copy"}},
        StartCase{"ZeroLengthFile",
                  false,
                  Spoil::kZeroLength,
                  false,
                  false,
                  StatusCode::kFailedPrecondition,
                  {"$", "empty file", "--new-ledger"}},
        StartCase{"DeletedWhileOperatorTokenExists",
                  false,
                  Spoil::kDeleteKeepToken,
                  false,
                  false,
                  StatusCode::kFailedPrecondition,
                  {"$", "does not exist", "operator.token"}},
        StartCase{"DeletedWhileSideFileExists",
                  false,
                  Spoil::kDeleteKeepSideFile,
                  false,
                  false,
                  StatusCode::kFailedPrecondition,
                  {"$", "tickmark.db.heads", "--new-ledger"}},
        StartCase{"DeletedAndANewLedgerAskedFor",
                  false,
                  Spoil::kDeleteKeepToken,
                  true,
                  false,
                  StatusCode::kOk,
                  {},
                  0},
        StartCase{"ZeroLengthAndANewLedgerAskedFor",
                  false,
                  Spoil::kZeroLength,
                  true,
                  false,
                  StatusCode::kOk,
                  {},
                  0},
        StartCase{"WalRemovedAfterWriting",
                  true,
                  Spoil::kDropWal,
                  false,
                  false,
                  StatusCode::kDataLoss,
                  {"$", "session s-a: records 51..300 missing (ledger ends at 50)",
                   "--accept-lost-records"}},
        StartCase{"WalDamagedAfterWriting",
                  true,
                  Spoil::kDamageWal,
                  false,
                  false,
                  StatusCode::kDataLoss,
                  {"$", "session s-a: records", "--accept-lost-records"}},
        StartCase{"WalRemovedAndTheLossAccepted",
                  true,
                  Spoil::kDropWal,
                  false,
                  true,
                  StatusCode::kOk,
                  {},
                  kCheckpointed},
        StartCase{
            "FreshEmptyFolder", false, Spoil::kEmptyFolder, false, false, StatusCode::kOk, {}, 0}),
    [](const ::testing::TestParamInfo<StartCase>& p) { return std::string(p.param.name); });

}  // namespace
}  // namespace tickmark::ledger

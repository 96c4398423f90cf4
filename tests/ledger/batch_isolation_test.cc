// One failing insert in a group commit fails only its own Append group: the
// other groups in the same transaction commit, and the failed group's
// sequences go to the session's next records, so the chain has no hole.
// (The old writer rolled back the whole transaction and then refused every
// write until a restart.)
#include <gtest/gtest.h>

#include <future>

#include "tests/ledger/ledger_test_util.h"

namespace tickmark::ledger {
namespace {

using namespace tickmark::ledger::testing;

struct Group {
  std::string session;
  std::string client;
  uint64_t client_sequence;
  absl::StatusCode want;
};

struct IsolationCase {
  const char* name;
  std::vector<Group> groups;  // appended while the writer is held, so they share one transaction
};

class BatchIsolationTest : public ::testing::TestWithParam<IsolationCase> {
 protected:
  void SetUp() override { dir_ = MakeTempDir("tm-batch"); }
  void TearDown() override { std::filesystem::remove_all(dir_); }
  std::string dir_;
};

TEST_P(BatchIsolationTest, OnlyTheFailingGroupFailsAndTheChainHasNoHole) {
  SqliteLedger::Options o;
  o.path = dir_ + "/t.db";
  auto opened = SqliteLedger::Open(o);
  ASSERT_TRUE(opened.ok()) << opened.status().message();
  std::unique_ptr<SqliteLedger> ledger = std::move(*opened);
  ASSERT_TRUE(ledger->CreateSession(Session("s-a")).ok());
  ASSERT_TRUE(ledger->CreateSession(Session("s-b")).ok());
  // Committed before: c1 #1 in s-a.
  ASSERT_TRUE(AppendAndWait(ledger.get(), "s-a", {FeedbackRecord("c1", 1, 1)}).status.ok());

  // Hold the writer inside a barrier so that every group below is queued
  // before it wakes and they all go into one transaction.
  std::promise<void> release;
  std::shared_future<void> released = release.get_future().share();
  std::promise<void> holding;
  ledger->Barrier([released, &holding] {
    holding.set_value();
    released.wait();
  });
  holding.get_future().wait();

  const IsolationCase& c = GetParam();
  std::vector<std::future<Committed>> results;
  for (const Group& g : c.groups) {
    auto done = std::make_shared<std::promise<Committed>>();
    results.push_back(done->get_future());
    ASSERT_TRUE(ledger
                    ->Append(g.session, {FeedbackRecord(g.client, g.client_sequence, 1)},
                             [done](const absl::Status& s, const std::vector<v1::Record>& rs) {
                               done->set_value(Committed{s, rs});
                             })
                    .ok());
  }
  release.set_value();

  std::map<std::string, uint64_t> stored;  // per session, records that committed
  stored["s-a"] = 1;
  for (size_t i = 0; i < c.groups.size(); ++i) {
    ASSERT_EQ(results[i].wait_for(std::chrono::seconds(30)), std::future_status::ready);
    Committed got = results[i].get();
    EXPECT_EQ(got.status.code(), c.groups[i].want) << "group " << i << ": " << got.status.message();
    if (got.status.ok()) {
      // Sequences as committed: consecutive per session, whatever failed before.
      EXPECT_EQ(got.records[0].sequence(), ++stored[c.groups[i].session]) << "group " << i;
    }
  }
  EXPECT_TRUE(ledger->WriteHealth().ok()) << ledger->WriteHealth().message();
  for (const auto& [session, last] : stored) ExpectChainVerifies(ledger.get(), session, last);
  // Writes go on, continuing the chain.
  Committed after = AppendAndWait(ledger.get(), "s-a", {FeedbackRecord("c9", 1, 1)});
  ASSERT_TRUE(after.status.ok()) << after.status.message();
  EXPECT_EQ(after.records[0].sequence(), stored["s-a"] + 1);
  ExpectChainVerifies(ledger.get(), "s-a", stored["s-a"] + 1);

  // And the side file agrees after a reopen (no loss reported).
  ledger.reset();
  opened = SqliteLedger::Open(o);
  ASSERT_TRUE(opened.ok()) << opened.status().message();
  ExpectChainVerifies(opened->get(), "s-a", stored["s-a"] + 1);
}

constexpr auto kOk = absl::StatusCode::kOk;
constexpr auto kDup = absl::StatusCode::kAlreadyExists;

INSTANTIATE_TEST_SUITE_P(
    Cases, BatchIsolationTest,
    ::testing::Values(IsolationCase{"DuplicateOfACommittedRecord",
                                    {{"s-a", "c1", 2, kOk},
                                     {"s-a", "c1", 1, kDup},  // slipped past the server's dedup
                                     {"s-a", "c1", 3, kOk},
                                     {"s-b", "c2", 1, kOk}}},
                      IsolationCase{"DuplicateInsideTheSameBatch",
                                    {{"s-a", "c2", 5, kOk},
                                     {"s-b", "c2", 5, kOk},   // same key, other session: fine
                                     {"s-a", "c2", 5, kDup},  // resent before the first committed
                                     {"s-a", "c2", 6, kOk}}},
                      IsolationCase{"FirstAndLastFail",
                                    {{"s-a", "c1", 1, kDup},
                                     {"s-a", "c3", 1, kOk},
                                     {"s-b", "c3", 1, kOk},
                                     {"s-a", "c3", 1, kDup}}}),
    [](const ::testing::TestParamInfo<IsolationCase>& p) { return p.param.name; });

}  // namespace
}  // namespace tickmark::ledger

// Retiming a stored session (retime_runner.h): records as the server writes
// them — connects, probes (accepted, and a rejected jump candidate), model
// restarts, feedback and steps — go into a real SQLite ledger; RunRetime must
// split the clocks per connection and at the restart, keep the live times of
// a client without probes, store a time set naming the journal state, and
// bound every feedback's true time. The device clocks and link delays are
// simulated, so the truth is known; the bounds rest on the RFC 5905 §8
// timestamp roles and non-negative one-way delays.
#include "server/rpc/retime_runner.h"

#include <gtest/gtest.h>

#include <filesystem>
#include <map>
#include <random>

#include "server/ledger/sqlite/sqlite_ledger.h"
#include "tests/ledger/ledger_test_util.h"

namespace tickmark::rpc {
namespace {

namespace v1 = tickmark::v1;
using ledger::testing::AppendAndWait;

constexpr int64_t kOpen = 1'700'000'000'000'000'000;  // session time at the start
constexpr int64_t kS = 1'000'000'000;

// A device clock: offset and drift against session time, stepped at `jump_at`.
struct Device {
  int64_t offset_ns;
  double drift_ppm;
  int64_t jump_at = INT64_MAX;
  int64_t jump_ns = 0;
  int64_t Read(int64_t session_ns) const {
    const double since = static_cast<double>(session_ns - kOpen);
    return session_ns + offset_ns + (session_ns >= jump_at ? jump_ns : 0) +
           std::llround(since * drift_ppm * 1e-6);
  }
};

class Script {
 public:
  explicit Script(uint64_t seed) : rng_(seed) {}

  v1::Record Connect(const std::string& client, int64_t at) {
    v1::Record r = At(at);
    auto* e = r.mutable_client_event();
    e->mutable_client()->set_client_id(client);
    e->set_event(v1::ClientEvent::KIND_CONNECTED);
    return r;
  }
  // One probe exchange starting at t1 over a 20 ± 5 ms link each way.
  v1::Record Probe(const std::string& client, const Device& d, int64_t t1) {
    const int64_t at_client = t1 + Delay();
    const int64_t t4 = at_client + 50'000 + Delay();
    v1::Record r = At(t4);
    auto* p = r.mutable_probe();
    p->set_client_id(client);
    p->set_t1_session_ns(t1);
    p->set_t2_client_ns(d.Read(at_client));
    p->set_t3_client_ns(d.Read(at_client + 50'000));
    p->set_t4_session_ns(t4);
    p->set_accepted(true);
    return r;
  }
  v1::Record Feedback(const std::string& client, const Device& d, uint64_t cseq, int64_t truth) {
    const int64_t arrival = truth + Delay();
    v1::Record r = At(arrival);
    auto* f = r.mutable_feedback();
    f->set_client_id(client);
    f->set_client_sequence(cseq);
    f->set_trainer("ava");
    f->set_value(1);
    f->set_event_source_ns(d.Read(truth));
    f->set_arrival_session_ns(arrival);
    // The live mapping, off by a few ms with a stated 30 ms.
    f->set_event_session_ns(truth + 3'000'000);
    f->set_uncertainty_ns(30'000'000);
    return r;
  }
  v1::Record Step(uint64_t cseq, int64_t start, int64_t end) {
    v1::Record r = At(end + 1'000'000);
    auto* s = r.mutable_step();
    s->set_client_id("agent-1");
    s->set_client_sequence(cseq);
    s->set_agent("rover");
    s->set_step_id(cseq);
    s->set_start_agent_ns(start - 5 * kS);
    s->set_end_agent_ns(end - 5 * kS);
    s->set_start_session_ns(start);
    s->set_end_session_ns(end);
    s->set_arrival_session_ns(end + 1'000'000);
    s->set_uncertainty_ns(2'000'000);
    return r;
  }
  v1::Record Restart(const std::string& client, int64_t at) {
    v1::Record r = At(at);
    r.mutable_clock_model()->set_client_id(client);
    r.mutable_clock_model()->set_reason("restart: client clock jumped (offset now 5.2 s)");
    return r;
  }

 private:
  v1::Record At(int64_t written) {
    v1::Record r;
    r.set_written_session_ns(written);
    return r;
  }
  int64_t Delay() { return std::uniform_int_distribution<int64_t>(15'000'000, 25'000'000)(rng_); }
  std::mt19937_64 rng_;
};

class RetimeRunnerTest : public ::testing::Test {
 protected:
  void SetUp() override {
    dir_ = ledger::testing::MakeTempDir("tm-retime-runner");
    ledger::SqliteLedger::Options o;
    o.path = dir_ + "/t.db";
    auto l = ledger::SqliteLedger::Open(o);
    ASSERT_TRUE(l.ok()) << l.status().message();
    ledger_ = std::move(*l);
    ASSERT_TRUE(ledger_->CreateSession(ledger::testing::Session("s-1")).ok());
    ASSERT_TRUE(ledger_->CreateSession(ledger::testing::Session("s-2")).ok());
  }
  void TearDown() override {
    ledger_.reset();
    std::filesystem::remove_all(dir_);
  }
  std::string dir_;
  std::unique_ptr<ledger::SqliteLedger> ledger_;
};

TEST_F(RetimeRunnerTest, ClocksPerConnectionRestartsAndAClientWithoutProbes) {
  Script script(11);
  const Device first{3'200'000'000, 80};
  // The second connection: another clock, stepped by +2 s at 70.5 s.
  const Device second{-7'000'000'000, -150, kOpen + 70'500'000'000, 2'000'000'000};
  std::vector<v1::Record> records;
  std::map<uint64_t, int64_t> truth_of_cseq;
  uint64_t cseq = 0;
  records.push_back(script.Connect("keys:ava:1", kOpen));
  for (int64_t t = 0; t < 40; ++t)
    records.push_back(script.Probe("keys:ava:1", first, kOpen + t * kS));
  for (int64_t t = kOpen + 300'000'000; t < kOpen + 39 * kS; t += 700'000'000) {
    truth_of_cseq[++cseq] = t;
    records.push_back(script.Feedback("keys:ava:1", first, cseq, t));
  }
  records.push_back(script.Connect("keys:ava:1", kOpen + 41 * kS));
  for (int64_t t = 41; t < 100; ++t) {
    v1::Record p = script.Probe("keys:ava:1", second, kOpen + t * kS);
    if (t == 71) {  // the first probe after the jump: held as a candidate
      p.mutable_probe()->set_accepted(false);
      p.mutable_probe()->set_reject_reason("rejected_unconfirmed_jump");
    }
    const int64_t t4 = p.probe().t4_session_ns();
    records.push_back(p);
    if (t == 72) records.push_back(script.Restart("keys:ava:1", t4));
  }
  for (int64_t t = kOpen + 41'300'000'000; t < kOpen + 99 * kS; t += 700'000'000) {
    truth_of_cseq[++cseq] = t;
    records.push_back(script.Feedback("keys:ava:1", second, cseq, t));
  }
  // An agent whose clock was never probed (no probe record at all).
  for (uint64_t k = 1; k <= 5; ++k) {
    records.push_back(script.Step(k, kOpen + static_cast<int64_t>(k) * kS,
                                  kOpen + static_cast<int64_t>(k + 1) * kS));
  }
  std::stable_sort(records.begin(), records.end(), [](const v1::Record& a, const v1::Record& b) {
    return a.written_session_ns() < b.written_session_ns();
  });
  auto committed = AppendAndWait(ledger_.get(), "s-1", records);
  ASSERT_TRUE(committed.status.ok()) << committed.status.message();
  std::map<uint64_t, int64_t> truth;  // sequence -> true session time
  for (const v1::Record& r : committed.records) {
    if (r.has_feedback()) truth[r.sequence()] = truth_of_cseq[r.feedback().client_sequence()];
  }

  uint64_t progress_calls = 0;
  auto summary = RunRetime(
      ledger_.get(), "s-1", RetimeOptions{}, [&](uint64_t, uint64_t) { ++progress_calls; },
      [] { return false; });
  ASSERT_TRUE(summary.ok()) << summary.status().message();
  EXPECT_TRUE(summary->finished());
  EXPECT_EQ(summary->clocks(), 3u);  // two connections of ava, the agent
  EXPECT_EQ(summary->events(), truth.size() + 10);
  EXPECT_EQ(summary->retimed(), truth.size());
  EXPECT_EQ(summary->kept().at("no_probes"), 10u);  // five steps, start and end
  EXPECT_EQ(summary->through_sequence(), records.size());
  EXPECT_GT(summary->moved_max_ns(), 0);
  // The live times were stated with 30 ms; the probes bound them to about
  // half the smallest round trip (≈ 15 ms).
  EXPECT_LT(summary->retimed_uncertainty_p50_ns(), summary->live_uncertainty_p50_ns());
  EXPECT_EQ(summary->narrower(), summary->retimed());

  auto set = ledger_->GetTimeSet(summary->time_set());
  ASSERT_TRUE(set.ok());
  EXPECT_EQ(set->method, kRetimeMethod);
  EXPECT_EQ(set->head_hash, committed.records.back().hash());
  EXPECT_EQ(set->through_sequence, committed.records.back().sequence());

  auto rows = ledger_->ReadDerivedTimes(summary->time_set());
  ASSERT_TRUE(rows.ok());
  int covered = 0;
  for (const ledger::DerivedTimeRow& row : *rows) {
    if (row.kind != "feedback") {
      EXPECT_EQ(row.outcome, "no_probes");
      EXPECT_EQ(row.event_session_ns, row.live_session_ns);
      continue;
    }
    EXPECT_EQ(row.outcome, "retimed");
    const int64_t err = std::llabs(row.event_session_ns - truth.at(row.sequence));
    EXPECT_LE(err, row.uncertainty_ns) << "feedback at sequence " << row.sequence;
    covered += err <= row.uncertainty_ns ? 1 : 0;
  }
  EXPECT_EQ(covered, static_cast<int>(truth.size()));

  // A replay's view of the set: "latest" is this one; its times replace the
  // recorded ones in a copy of the record.
  auto latest = LoadDerivedTimes(ledger_.get(), "s-1", "latest");
  ASSERT_TRUE(latest.ok());
  EXPECT_EQ(latest->set.id, summary->time_set());
  v1::Record fb = committed.records[0];
  for (const v1::Record& r : committed.records) {
    if (r.has_feedback()) {
      fb = r;
      break;
    }
  }
  v1::Record copy = fb;
  ASSERT_TRUE(ApplyDerivedTimes(*latest, &copy));
  EXPECT_NE(copy.feedback().event_session_ns(), fb.feedback().event_session_ns());
  EXPECT_LE(std::llabs(copy.feedback().event_session_ns() - truth.at(fb.sequence())),
            copy.feedback().uncertainty_ns());
  EXPECT_TRUE(
      absl::IsNotFound(LoadDerivedTimes(ledger_.get(), "s-2", summary->time_set()).status()));
  EXPECT_TRUE(absl::IsNotFound(LoadDerivedTimes(ledger_.get(), "s-2", "latest").status()));
  // The originals are untouched.
  ledger::testing::ExpectChainVerifies(ledger_.get(), "s-1", records.size());
}

// Disciplined clocks (docs/time-model.md): a feedback mapped live through
// real time with a 2 ms bound keeps its live time; the probes around it
// (20 ± 5 ms each way) cannot bound it that tightly.
TEST_F(RetimeRunnerTest, ARealTimeMappingTighterThanTheProbesIsKept) {
  Script script(12);
  const Device device{3'200'000'000, 80};
  std::vector<v1::Record> records;
  records.push_back(script.Connect("keys:ava:1", kOpen));
  for (int64_t t = 0; t < 20; ++t) {
    records.push_back(script.Probe("keys:ava:1", device, kOpen + t * kS));
  }
  const int64_t truth = kOpen + 10'300'000'000;
  v1::Record realtime = script.Feedback("keys:ava:1", device, 1, truth);
  realtime.mutable_feedback()->set_event_session_ns(truth + 500'000);
  realtime.mutable_feedback()->set_uncertainty_ns(2'000'000);
  realtime.mutable_feedback()->set_time_source(v1::TIME_SOURCE_REALTIME);
  records.push_back(realtime);
  records.push_back(script.Feedback("keys:ava:1", device, 2, truth + kS));  // round trip
  std::stable_sort(records.begin(), records.end(), [](const v1::Record& a, const v1::Record& b) {
    return a.written_session_ns() < b.written_session_ns();
  });
  auto committed = AppendAndWait(ledger_.get(), "s-1", records);
  ASSERT_TRUE(committed.status.ok()) << committed.status.message();
  auto summary = RunRetime(
      ledger_.get(), "s-1", RetimeOptions{}, [](uint64_t, uint64_t) {}, [] { return false; });
  ASSERT_TRUE(summary.ok()) << summary.status().message();
  EXPECT_EQ(summary->events(), 2u);
  EXPECT_EQ(summary->retimed(), 1u);
  EXPECT_EQ(summary->kept().at("realtime"), 1u);
  auto rows = ledger_->ReadDerivedTimes(summary->time_set());
  ASSERT_TRUE(rows.ok());
  ASSERT_EQ(rows->size(), 2u);
  for (const ledger::DerivedTimeRow& row : *rows) {
    if (row.outcome == "realtime") {
      EXPECT_EQ(row.event_session_ns, truth + 500'000);
      EXPECT_EQ(row.uncertainty_ns, 2'000'000);
    } else {
      EXPECT_EQ(row.outcome, "retimed");
      EXPECT_GT(row.uncertainty_ns, 2'000'000);  // about half the smallest round trip
    }
  }
}

TEST_F(RetimeRunnerTest, ASessionWithoutEventsIsRefused) {
  auto none = RunRetime(
      ledger_.get(), "s-2", RetimeOptions{}, [](uint64_t, uint64_t) {}, [] { return false; });
  EXPECT_EQ(none.status().code(), absl::StatusCode::kFailedPrecondition);
  auto unknown = RunRetime(
      ledger_.get(), "s-404", RetimeOptions{}, [](uint64_t, uint64_t) {}, [] { return false; });
  EXPECT_EQ(unknown.status().code(), absl::StatusCode::kNotFound);
}

}  // namespace
}  // namespace tickmark::rpc

// Credit through the whole server on 127.0.0.1:0: an agent publishes steps,
// trainers send feedback, the session closes, and the credit and label
// records must be what tickmark::Credit() gives on the stored step intervals
// and feedback event times (docs/architecture.md §5). Per-trainer kernels and weights
// (SetKernel), unmatched feedback, replay into a derived set (same kernels:
// bit-identical; another kernel: labels change, the session's own records
// do not), and an engine rebuilt after a server restart.
//
// Expected values are computed here from kernels this file builds itself:
// uniform 0.2–4 s (Warnell, Waytowich, Lawhern & Stone, AAAI 2018,
// arXiv:1709.10163) and gamma shape 2, scale 0.28 s (Knox & Stone, K-CAP
// 2009 — parameters from memory, not verified).
#include <sqlite3.h>

#include <cmath>
#include <map>
#include <set>
#include <tuple>
#include <vector>

#include "server/core/delay_kernel.h"
#include "server/rpc/credit_driver.h"
#include "tests/rpc/test_server.h"

namespace tickmark::testing {
namespace {

constexpr int64_t kMs = 1'000'000;

// Warnell et al., AAAI 2018 (published, seen quoted): uniform on [0.2, 4] s.
DelayKernel UniformKernel() { return *DelayKernel::Uniform(Duration::Millis(200), Duration::Millis(4000)); }
// Knox & Stone, K-CAP 2009 — from memory: gamma shape 2, scale 0.28 s.
DelayKernel GammaKernel() { return *DelayKernel::Gamma(2.0, 0.28, Duration::Zero()); }

std::vector<v1::Record> ReadAll(grpc::ClientReader<v1::Record>* reader) {
  std::vector<v1::Record> out;
  v1::Record r;
  while (reader->Read(&r)) out.push_back(r);
  return out;
}

// Rows of the `label` table of one derived set, read with the sqlite3 C API
// (an outside reader of the ledger file): step sequence -> (value, weight).
std::map<uint64_t, std::pair<double, double>> SqliteLabels(const std::string& db_path,
                                                           const std::string& session,
                                                           const std::string& set) {
  std::map<uint64_t, std::pair<double, double>> out;
  sqlite3* db = nullptr;
  if (sqlite3_open_v2(db_path.c_str(), &db, SQLITE_OPEN_READONLY, nullptr) != SQLITE_OK) {
    ADD_FAILURE() << "cannot open " << db_path;
    sqlite3_close(db);
    return out;
  }
  sqlite3_busy_timeout(db, 5000);
  sqlite3_stmt* q = nullptr;
  EXPECT_EQ(sqlite3_prepare_v2(db,
                               "SELECT step_seq, value, weight FROM label "
                               "WHERE session_id = ? AND derived_set = ? ORDER BY seq",
                               -1, &q, nullptr),
            SQLITE_OK)
      << sqlite3_errmsg(db);
  sqlite3_bind_text(q, 1, session.c_str(), -1, SQLITE_TRANSIENT);
  sqlite3_bind_text(q, 2, set.c_str(), -1, SQLITE_TRANSIENT);
  while (sqlite3_step(q) == SQLITE_ROW) {
    const auto step = static_cast<uint64_t>(sqlite3_column_int64(q, 0));
    EXPECT_EQ(out.count(step), 0u) << "two labels for step " << step << " in set " << set;
    out[step] = {sqlite3_column_double(q, 1), sqlite3_column_double(q, 2)};
  }
  sqlite3_finalize(q);
  sqlite3_close(db);
  return out;
}

// What a replay streamed: its final status and comparison.
struct ReplayResult {
  grpc::Status status;
  std::optional<v1::ReplayComparison> comparison;
};

class CreditTest : public ::testing::Test {
 protected:
  void SetUp() override { StartServer(); }

  void StartServer() {
    // The scenarios script feedback up to ~4.3 s ahead of its arrival, so
    // that nothing settles while they run.
    rpc::LiveService::Options o = TestLiveOptions();
    o.event_future_tolerance = Duration::Seconds(5);
    server_ = std::make_unique<TestServer>(dir_.path(), o);
  }

  void Restart() {
    server_->Shutdown();
    server_.reset();
    StartServer();
  }

  // A session with `kernel` as its default, and tokens for two trainers and
  // one agent.
  void CreateSession(const std::string& kernel) {
    v1::CreateSessionRequest req;
    req.set_title("dock rover, credit");
    req.set_default_kernel(kernel);
    v1::CreateSessionResponse resp;
    auto ctx = server_->Context(server_->operator_token());
    ASSERT_TRUE(server_->admin().CreateSession(ctx.get(), req, &resp).ok());
    session_ = resp.session().id();
    admin_ = resp.admin_secret();
    ava_ = server_->IssueToken(session_, v1::ROLE_TRAINER, "ava", admin_);
    ben_ = server_->IssueToken(session_, v1::ROLE_TRAINER, "ben", admin_);
    rover_ = server_->IssueToken(session_, v1::ROLE_AGENT, "rover-1", admin_);
  }

  grpc::Status SetKernel(const std::string& trainer, const std::string& kernel, double weight) {
    v1::SetKernelRequest req;
    req.set_session_id(session_);
    req.set_trainer(trainer);
    req.set_kernel(kernel);
    req.set_weight(weight);
    v1::SetKernelResponse resp;
    auto ctx = server_->Context(admin_);
    return server_->admin().SetKernel(ctx.get(), req, &resp);
  }

  void CloseSession() {
    v1::CloseSessionRequest req;
    req.set_session_id(session_);
    v1::Session closed;
    auto ctx = server_->Context(admin_);
    ASSERT_TRUE(server_->admin().CloseSession(ctx.get(), req, &closed).ok());
  }

  v1::SessionSummary Summary() {
    v1::GetSessionRequest req;
    req.set_session_id(session_);
    v1::SessionSummary resp;
    auto ctx = server_->Context(admin_);
    EXPECT_TRUE(server_->admin().GetSession(ctx.get(), req, &resp).ok());
    return resp;
  }

  // Every record the ledger holds, through Subscribe (replay, stop at end).
  std::vector<v1::Record> Subscribed(uint64_t from = 1) {
    v1::SubscribeRequest req;
    req.set_session_id(session_);
    req.set_from_sequence(from);
    req.set_stop_at_end(true);
    auto ctx = server_->Context(admin_);
    auto reader = server_->live().Subscribe(ctx.get(), req);
    auto out = ReadAll(reader.get());
    EXPECT_TRUE(reader->Finish().ok());
    return out;
  }

  // Every record of the session as the ledger file holds it (record.body,
  // parsed, with a feedback's personal content from the `personal` table:
  // chain version 2, docs/audit.md), read with the sqlite3 C API outside the
  // server's own reader.
  std::vector<v1::Record> LedgerFileRecords() {
    std::vector<v1::Record> out;
    sqlite3* db = nullptr;
    const std::string path = server_->server().ledger_path();
    if (sqlite3_open_v2(path.c_str(), &db, SQLITE_OPEN_READONLY, nullptr) != SQLITE_OK) {
      ADD_FAILURE() << "cannot open " << path;
      sqlite3_close(db);
      return out;
    }
    sqlite3_busy_timeout(db, 5000);
    sqlite3_stmt* q = nullptr;
    EXPECT_EQ(sqlite3_prepare_v2(db,
                                 "SELECT r.seq, r.body, r.hash, p.content FROM record r "
                                 "LEFT JOIN personal p ON p.session_id = r.session_id AND "
                                 "p.seq = r.seq WHERE r.session_id = ? ORDER BY r.seq",
                                 -1, &q, nullptr),
              SQLITE_OK);
    sqlite3_bind_text(q, 1, session_.c_str(), -1, SQLITE_TRANSIENT);
    while (sqlite3_step(q) == SQLITE_ROW) {
      v1::Record r;
      const void* body = sqlite3_column_blob(q, 1);
      EXPECT_TRUE(r.ParseFromArray(body, sqlite3_column_bytes(q, 1)));
      r.set_sequence(static_cast<uint64_t>(sqlite3_column_int64(q, 0)));
      r.set_hash(std::string(static_cast<const char*>(sqlite3_column_blob(q, 2)),
                             static_cast<size_t>(sqlite3_column_bytes(q, 2))));
      if (r.has_feedback() && sqlite3_column_type(q, 3) != SQLITE_NULL) {
        v1::PersonalContent personal;
        EXPECT_TRUE(personal.ParseFromArray(sqlite3_column_blob(q, 3), sqlite3_column_bytes(q, 3)));
        r.mutable_feedback()->set_value(personal.value());
        r.mutable_feedback()->set_input(personal.input());
      }
      out.push_back(std::move(r));
    }
    sqlite3_finalize(q);
    sqlite3_close(db);
    return out;
  }

  ReplayResult Replay(const std::string& name, const std::string& kernel, bool overwrite = false) {
    v1::ReplayRequest req;
    req.set_session_id(session_);
    req.set_name(name);
    req.set_kernel(kernel);
    req.set_overwrite(overwrite);
    auto ctx = server_->Context(admin_);
    auto reader = server_->admin().Replay(ctx.get(), req);
    ReplayResult out;
    v1::ReplayProgress p;
    while (reader->Read(&p)) {
      if (p.finished()) out.comparison = p.result();
    }
    out.status = reader->Finish();
    return out;
  }

  // Opens an agent stream and publishes `n` steps of `length` from
  // `first_start` on the agent's clock, each with its end given.
  void PublishSteps(AgentStream& a, uint64_t first_id, int n, int64_t first_start, int64_t length) {
    for (int i = 0; i < n; ++i) {
      const uint64_t id = first_id + static_cast<uint64_t>(i);
      const int64_t start = first_start + i * length;
      ASSERT_TRUE(a.Write(StepMsg(id, id, start, start + length, i % 2 ? "north" : "east")));
      auto ack = a.NextAck();
      ASSERT_TRUE(ack);
      ASSERT_EQ(ack->code(), 0) << ack->message();
    }
  }

  static uint64_t SendFeedback(TrainerStream& t, uint64_t cseq, double value, int64_t event_ns) {
    if (!t.Write(Feedback(cseq, value, event_ns))) return 0;
    auto ack = t.NextAck();
    EXPECT_TRUE(ack);
    if (!ack) return 0;
    EXPECT_EQ(ack->code(), 0) << ack->message();
    return ack->sequence();
  }

  TempDir dir_;
  std::unique_ptr<TestServer> server_;
  std::string session_, admin_, ava_, ben_, rover_;
};

// The session's records, split by kind, and what Credit() says they should
// have produced.
struct Checked {
  std::map<uint64_t, v1::Step> steps;        // by sequence
  std::map<uint64_t, v1::Feedback> feedback;  // by sequence
  std::vector<v1::CreditUpdate> credits;     // in sequence order
  std::map<uint64_t, v1::Label> labels;      // by step sequence
  std::vector<v1::Unmatched> unmatched;
  std::vector<uint64_t> label_record_sequences;
};

Checked Split(const std::vector<v1::Record>& records) {
  Checked c;
  for (const v1::Record& r : records) {
    if (r.has_step()) c.steps[r.sequence()] = r.step();
    if (r.has_feedback()) c.feedback[r.sequence()] = r.feedback();
    if (r.has_credit()) c.credits.push_back(r.credit());
    if (r.has_label()) {
      EXPECT_EQ(c.labels.count(r.label().step_sequence()), 0u) << "label twice";
      c.labels[r.label().step_sequence()] = r.label();
      c.label_record_sequences.push_back(r.sequence());
    }
    if (r.has_unmatched()) c.unmatched.push_back(r.unmatched());
  }
  return c;
}

// The kernel and weight in force for a feedback, as the test set them up.
struct InForce {
  DelayKernel kernel;
  double weight;
};

// Checks every credit record and every label against Credit() on the stored
// times; `in_force(feedback sequence, trainer)` names the kernel expected.
template <typename InForceFn>
void CheckCreditAndLabels(const Checked& c, InForceFn in_force) {
  // Expected credit of every (feedback, step) pair with positive credit.
  std::map<std::pair<uint64_t, uint64_t>, double> expected;
  for (const auto& [fseq, f] : c.feedback) {
    const InForce k = in_force(fseq, f.trainer());
    for (const auto& [sseq, s] : c.steps) {
      ASSERT_NE(s.end_session_ns(), 0) << "every step here has its end given";
      const double credit = Credit(k.kernel, SessionTime::FromNanos(f.event_session_ns()),
                                   SessionTime::FromNanos(s.start_session_ns()),
                                   SessionTime::FromNanos(s.end_session_ns()));
      if (credit > 0) expected[{fseq, sseq}] = credit;
    }
  }
  std::set<std::pair<uint64_t, uint64_t>> seen;
  // Per step, in the order credits are published (docs/architecture.md §5 label).
  std::map<uint64_t, v1::Label> summed;
  for (const v1::CreditUpdate& u : c.credits) {
    const std::pair<uint64_t, uint64_t> key{u.feedback_sequence(), u.step_sequence()};
    EXPECT_TRUE(seen.insert(key).second) << "credit twice for " << key.first << "/" << key.second;
    auto it = expected.find(key);
    ASSERT_NE(it, expected.end()) << "unexpected credit of feedback " << key.first << " on step "
                                  << key.second << ": " << u.credit();
    // The same code runs on the same stored times: bit for bit.
    EXPECT_EQ(u.credit(), it->second) << key.first << "/" << key.second;
    const v1::Feedback& f = c.feedback.at(u.feedback_sequence());
    const v1::Step& s = c.steps.at(u.step_sequence());
    const InForce k = in_force(u.feedback_sequence(), f.trainer());
    EXPECT_EQ(u.kernel(), k.kernel.Describe());
    EXPECT_EQ(u.weight(), k.weight);
    EXPECT_EQ(u.value(), f.value());
    EXPECT_EQ(u.trainer(), f.trainer());
    EXPECT_EQ(u.agent(), s.agent());
    EXPECT_EQ(u.step_id(), s.step_id());
    v1::Label& l = summed[u.step_sequence()];
    const double credited = u.credit() * u.value() * u.weight();
    l.set_value(l.value() + credited);
    l.set_weight(l.weight() + u.credit());
    v1::LabelPart* part = nullptr;
    for (auto& p : *l.mutable_parts()) {
      if (p.trainer() == u.trainer()) part = &p;
    }
    if (!part) {
      part = l.add_parts();
      part->set_trainer(u.trainer());
    }
    part->set_value(part->value() + credited);
    part->set_weight(part->weight() + u.credit());
  }
  EXPECT_EQ(seen.size(), expected.size()) << "credits missing";

  // One settled label per step, credited or not.
  EXPECT_EQ(c.labels.size(), c.steps.size());
  for (const auto& [sseq, s] : c.steps) {
    auto it = c.labels.find(sseq);
    ASSERT_NE(it, c.labels.end()) << "no label for step " << sseq;
    const v1::Label& got = it->second;
    EXPECT_TRUE(got.settled());
    EXPECT_EQ(got.step_id(), s.step_id());
    const v1::Label& want = summed[sseq];
    EXPECT_NEAR(got.value(), want.value(), 1e-12) << "step " << sseq;
    EXPECT_NEAR(got.weight(), want.weight(), 1e-12) << "step " << sseq;
    std::map<std::string, std::pair<double, double>> parts;
    for (const auto& p : want.parts()) parts[p.trainer()] = {p.value(), p.weight()};
    ASSERT_EQ(got.parts_size(), static_cast<int>(parts.size())) << "step " << sseq;
    std::string previous;
    for (const auto& p : got.parts()) {
      EXPECT_LT(previous, p.trainer()) << "parts ordered by trainer";
      previous = p.trainer();
      ASSERT_TRUE(parts.count(p.trainer()));
      EXPECT_NEAR(p.value(), parts[p.trainer()].first, 1e-12);
      EXPECT_NEAR(p.weight(), parts[p.trainer()].second, 1e-12);
    }
  }
}

// Agent steps of 100 ms from `base` + 0.2 s on its own clock; feedback from
// two trainers whose source clocks are off by +3.2 s and −1.7 s; ava's kernel
// is changed half way. Returns the sequence of ava's kernel setting.
struct Scenario {
  uint64_t ava_kernel_seq = 0;
  uint64_t ben_kernel_seq = 0;
  uint64_t unmatched_feedback = 0;
  std::vector<uint64_t> ava_feedback, ben_feedback;
};

class CreditScenarioTest : public CreditTest {
 protected:
  // Runs the scenario; steps are in the future of arrival (at most ~4.3 s,
  // within the 5 s plausibility bound) so that nothing settles while it runs
  // and every label comes out when the session closes.
  void Run(Scenario* sc) {
    CreateSession("uniform:0.2,4.0");
    auto a = OpenAgent(*server_);
    ASSERT_TRUE(a->SendHello(rover_, "rover-1"));
    ASSERT_TRUE(a->Welcome());
    const int64_t agent_base = a->Now();
    PublishSteps(*a, 1, 40, agent_base + 200 * kMs, 100 * kMs);

    constexpr int64_t kAvaOffset = 3'200'000'000;
    constexpr int64_t kBenOffset = -1'700'000'000;
    auto ava = OpenTrainer(*server_, kAvaOffset);
    ASSERT_TRUE(ava->SendHello(ava_, "ava-pad"));
    ASSERT_TRUE(ava->Welcome());
    auto ben = OpenTrainer(*server_, kBenOffset);
    ASSERT_TRUE(ben->SendHello(ben_, "ben-keys"));
    ASSERT_TRUE(ben->Welcome());
    // Event times relative to the agent's base, on each source's own clock.
    auto ava_at = [&](int64_t ms) { return agent_base + kAvaOffset + ms * kMs; };
    auto ben_at = [&](int64_t ms) { return agent_base + kBenOffset + ms * kMs; };

    // Under the session default (uniform 0.2–4 s, weight 1).
    uint64_t cseq_ava = 0, cseq_ben = 0;
    for (int64_t ms : {900, 1700, 2600}) {
      sc->ava_feedback.push_back(SendFeedback(*ava, ++cseq_ava, ms == 1700 ? -1.0 : 1.0, ava_at(ms)));
    }
    // No step has started 1 s before the agent's base: nothing in reach.
    sc->unmatched_feedback = SendFeedback(*ava, ++cseq_ava, 1.0, ava_at(-1000));

    ASSERT_TRUE(SetKernel("ava", "gamma:2,0.28", 2.0).ok());
    ASSERT_TRUE(SetKernel("ben", "uniform:0.2,4.0", 0.5).ok());
    for (const v1::Record& r : Subscribed()) {
      if (r.has_kernel() && r.kernel().trainer() == "ava") sc->ava_kernel_seq = r.sequence();
      if (r.has_kernel() && r.kernel().trainer() == "ben") sc->ben_kernel_seq = r.sequence();
    }
    ASSERT_NE(sc->ava_kernel_seq, 0u);
    ASSERT_NE(sc->ben_kernel_seq, 0u);

    for (int64_t ms : {1500, 2350, 3300, 4100}) {
      sc->ava_feedback.push_back(SendFeedback(*ava, ++cseq_ava, ms == 3300 ? -1.0 : 1.0, ava_at(ms)));
      sc->ben_feedback.push_back(SendFeedback(*ben, ++cseq_ben, ms == 2350 ? 0.5 : -1.0, ben_at(ms + 40)));
    }
    ASSERT_TRUE(ava->Close().ok());
    ASSERT_TRUE(ben->Close().ok());
    ASSERT_TRUE(a->Close().ok());
  }

  // Kernels as this test set them.
  InForce Expect(const Scenario& sc, uint64_t fseq, const std::string& trainer) const {
    if (trainer == "ava" && fseq > sc.ava_kernel_seq) return {GammaKernel(), 2.0};
    if (trainer == "ben" && fseq > sc.ben_kernel_seq) return {UniformKernel(), 0.5};
    return {UniformKernel(), 1.0};
  }
};

TEST_F(CreditScenarioTest, CreditAndLabelsEqualCreditOnStoredTimes) {
  Scenario sc;
  ASSERT_NO_FATAL_FAILURE(Run(&sc));
  ASSERT_NO_FATAL_FAILURE(CloseSession());
  // What a subscriber reads from the start, and the ledger file itself.
  const Checked c = Split(Subscribed());
  const Checked file = Split(LedgerFileRecords());
  EXPECT_EQ(c.credits.size(), file.credits.size());
  EXPECT_EQ(c.labels.size(), file.labels.size());
  CheckCreditAndLabels(file, [&](uint64_t f, const std::string& t) { return Expect(sc, f, t); });
  ASSERT_EQ(c.steps.size(), 40u);
  ASSERT_EQ(c.feedback.size(), 12u);
  ASSERT_FALSE(c.credits.empty());
  CheckCreditAndLabels(c, [&](uint64_t f, const std::string& t) { return Expect(sc, f, t); });

  // Unmatched: reported once, for the feedback with nothing in reach only.
  ASSERT_EQ(c.unmatched.size(), 1u);
  EXPECT_EQ(c.unmatched[0].feedback_sequence(), sc.unmatched_feedback);
  EXPECT_EQ(c.unmatched[0].trainer(), "ava");
  EXPECT_FALSE(c.unmatched[0].reason().empty());
  EXPECT_EQ(Summary().unmatched_count(), 1u);

  // SetKernel changed ava's later credit: gamma, weight 2, named in records.
  std::set<std::string> ava_kernels_before, ava_kernels_after;
  for (const v1::CreditUpdate& u : c.credits) {
    if (u.trainer() != "ava") continue;
    (u.feedback_sequence() > sc.ava_kernel_seq ? ava_kernels_after : ava_kernels_before)
        .insert(u.kernel());
  }
  EXPECT_EQ(ava_kernels_before, std::set<std::string>{UniformKernel().Describe()});
  EXPECT_EQ(ava_kernels_after, std::set<std::string>{GammaKernel().Describe()});
  // Two trainers with weights: each label's parts are per trainer.
  int steps_with_both = 0;
  for (const auto& [sseq, l] : c.labels) {
    if (l.parts_size() == 2) {
      ++steps_with_both;
      EXPECT_EQ(l.parts(0).trainer(), "ava");
      EXPECT_EQ(l.parts(1).trainer(), "ben");
      EXPECT_NEAR(l.value(), l.parts(0).value() + l.parts(1).value(), 1e-12);
      EXPECT_NEAR(l.weight(), l.parts(0).weight() + l.parts(1).weight(), 1e-12);
    }
  }
  EXPECT_GT(steps_with_both, 0);
}

// Regression (found while writing these tests, fixed in c4238f4): the labels
// written when a session closed came after its "closed" record, where
// Subscribe ends every stream, so no subscriber — following live, or reading
// the closed session with stop_at_end — ever received them.
TEST_F(CreditScenarioTest, SubscribersReceiveTheLabelsWrittenAtClose) {
  Scenario sc;
  ASSERT_NO_FATAL_FAILURE(Run(&sc));
  v1::SubscribeRequest req;
  req.set_session_id(session_);
  req.add_kinds(v1::RECORD_KIND_LABEL);
  req.add_kinds(v1::RECORD_KIND_CREDIT);
  req.add_kinds(v1::RECORD_KIND_UNMATCHED);
  auto fctx = server_->Context(admin_);
  auto follower = server_->live().Subscribe(fctx.get(), req);  // follows live
  ASSERT_NO_FATAL_FAILURE(CloseSession());
  const Checked from_file = Split(LedgerFileRecords());
  ASSERT_EQ(from_file.labels.size(), 40u);

  const Checked followed = Split(ReadAll(follower.get()));
  EXPECT_TRUE(follower->Finish().ok());
  EXPECT_EQ(followed.credits.size(), from_file.credits.size());
  EXPECT_EQ(followed.labels.size(), 40u);
  EXPECT_EQ(followed.unmatched.size(), 1u);

  const Checked replayed = Split(Subscribed());
  EXPECT_EQ(replayed.credits.size(), from_file.credits.size());
  EXPECT_EQ(replayed.labels.size(), 40u);
  EXPECT_EQ(replayed.unmatched.size(), 1u);
}

// What Subscribe delivers of a closed session equals the ledger file record
// for record, ending with "closed".
TEST_F(CreditScenarioTest, SubscribedCreditsEqualTheLedger) {
  Scenario sc;
  ASSERT_NO_FATAL_FAILURE(Run(&sc));
  ASSERT_NO_FATAL_FAILURE(CloseSession());
  const std::vector<v1::Record> file = LedgerFileRecords();
  const std::vector<v1::Record> got = Subscribed();
  ASSERT_FALSE(got.empty());
  ASSERT_EQ(got.size(), file.size());
  for (size_t i = 0; i < got.size(); ++i) {
    ASSERT_EQ(got[i].sequence(), i + 1);
    v1::Record want = file[i];
    want.set_session_id(got[i].session_id());
    EXPECT_EQ(got[i].SerializeAsString(), want.SerializeAsString()) << "sequence " << i + 1;
  }
  EXPECT_TRUE(got.back().has_session_event() &&
              got.back().session_event().event() == v1::SessionEvent::KIND_CLOSED);
  const Checked c = Split(got);
  for (const v1::CreditUpdate& u : c.credits) {
    const v1::Feedback& f = c.feedback.at(u.feedback_sequence());
    const v1::Step& s = c.steps.at(u.step_sequence());
    const InForce k = Expect(sc, u.feedback_sequence(), f.trainer());
    EXPECT_EQ(u.credit(), Credit(k.kernel, SessionTime::FromNanos(f.event_session_ns()),
                                 SessionTime::FromNanos(s.start_session_ns()),
                                 SessionTime::FromNanos(s.end_session_ns())));
  }
}

TEST_F(CreditScenarioTest, ReplayWithRecordedKernelsIsBitIdentical) {
  Scenario sc;
  ASSERT_NO_FATAL_FAILURE(Run(&sc));
  ASSERT_NO_FATAL_FAILURE(CloseSession());
  const auto live = SqliteLabels(server_->server().ledger_path(), session_, "live");
  ASSERT_EQ(live.size(), 40u);

  ReplayResult same = Replay("recorded", "");
  ASSERT_TRUE(same.status.ok()) << same.status.error_message();
  ASSERT_TRUE(same.comparison);
  EXPECT_EQ(same.comparison->labels(), 40u);
  EXPECT_EQ(same.comparison->changed(), 0u);
  EXPECT_EQ(same.comparison->max_abs_difference(), 0.0);
  EXPECT_EQ(same.comparison->sign_flips(), 0u);
  EXPECT_EQ(same.comparison->only_live(), 0u);
  EXPECT_EQ(same.comparison->only_replay(), 0u);
  EXPECT_EQ(same.comparison->unmatched(), 1u);

  const auto replayed = SqliteLabels(server_->server().ledger_path(), session_, "recorded");
  ASSERT_EQ(replayed.size(), live.size());
  for (const auto& [step, vw] : live) {
    ASSERT_TRUE(replayed.count(step)) << step;
    EXPECT_EQ(replayed.at(step).first, vw.first) << "step " << step;    // exact
    EXPECT_EQ(replayed.at(step).second, vw.second) << "step " << step;  // exact
  }
}

TEST_F(CreditScenarioTest, ReplayWithAnotherKernelChangesLabelsButNotTheSession) {
  Scenario sc;
  ASSERT_NO_FATAL_FAILURE(Run(&sc));
  ASSERT_NO_FATAL_FAILURE(CloseSession());
  const uint64_t count_before = Summary().session().last_sequence();
  const std::vector<v1::Record> before = LedgerFileRecords();
  ASSERT_EQ(before.size(), count_before);
  const std::string last_hash_before = before.back().hash();
  const auto live = SqliteLabels(server_->server().ledger_path(), session_, "live");

  // Everything recomputed with gamma(2, 0.28) (Knox & Stone, from memory)
  // where the session used uniform 0.2–4 s (Warnell et al.) for most.
  ReplayResult gamma = Replay("gamma-2-0.28", "gamma:2,0.28");
  ASSERT_TRUE(gamma.status.ok()) << gamma.status.error_message();
  ASSERT_TRUE(gamma.comparison);
  EXPECT_EQ(gamma.comparison->labels(), 40u);
  EXPECT_GT(gamma.comparison->changed(), 0u);
  EXPECT_GT(gamma.comparison->max_abs_difference(), 0.0);
  const auto derived = SqliteLabels(server_->server().ledger_path(), session_, "gamma-2-0.28");
  ASSERT_EQ(derived.size(), live.size());
  int differ = 0;
  for (const auto& [step, vw] : live) differ += derived.at(step).first != vw.first;
  EXPECT_EQ(static_cast<uint64_t>(differ), gamma.comparison->changed());

  // The session's own records are untouched.
  const std::vector<v1::Record> after = LedgerFileRecords();
  EXPECT_EQ(Summary().session().last_sequence(), count_before);
  ASSERT_EQ(after.size(), before.size());
  EXPECT_EQ(after.back().hash(), last_hash_before);
  EXPECT_EQ(SqliteLabels(server_->server().ledger_path(), session_, "live"), live);

  // The name is taken unless overwrite is asked for.
  ReplayResult again = Replay("gamma-2-0.28", "uniform:0.2,4.0");
  EXPECT_EQ(again.status.error_code(), grpc::StatusCode::ALREADY_EXISTS)
      << again.status.error_message();
  EXPECT_EQ(SqliteLabels(server_->server().ledger_path(), session_, "gamma-2-0.28"), derived);
  ReplayResult overwritten = Replay("gamma-2-0.28", "uniform:0.2,4.0", /*overwrite=*/true);
  ASSERT_TRUE(overwritten.status.ok()) << overwritten.status.error_message();
  ASSERT_TRUE(overwritten.comparison);
  EXPECT_NE(SqliteLabels(server_->server().ledger_path(), session_, "gamma-2-0.28"), derived);
  EXPECT_EQ(LedgerFileRecords().back().hash(), last_hash_before);
}

// The server stops mid-session; a new one on the same folder rebuilds the
// engine from the ledger, and the session goes on. The labels written across
// the restart equal a replay with the recorded kernels, and Credit() on the
// stored times.
TEST_F(CreditTest, RestartMidSessionRebuildsTheEngine) {
  ASSERT_NO_FATAL_FAILURE(CreateSession("gamma:2,0.28"));
  ASSERT_TRUE(SetKernel("ben", "uniform:0.2,4.0", 0.5).ok());
  int64_t agent_base = 0;
  {
    auto a = OpenAgent(*server_);
    ASSERT_TRUE(a->SendHello(rover_, "rover-1"));
    ASSERT_TRUE(a->Welcome());
    agent_base = a->Now();
    // Late enough that nothing settles before the restart is over.
    PublishSteps(*a, 1, 20, agent_base + 1000 * kMs, 100 * kMs);
    auto t = OpenTrainer(*server_);
    ASSERT_TRUE(t->SendHello(ava_, "ava-pad"));
    ASSERT_TRUE(t->Welcome());
    SendFeedback(*t, 1, 1.0, agent_base + 1700 * kMs);
    SendFeedback(*t, 2, -1.0, agent_base + 2700 * kMs);
    ASSERT_TRUE(t->Close().ok());
    ASSERT_TRUE(a->Close().ok());
  }
  Restart();
  {
    auto a = OpenAgent(*server_);
    ASSERT_TRUE(a->SendHello(rover_, "rover-1"));
    ASSERT_TRUE(a->Welcome());
    // 50 ms after the last step before the restart: the new connection's
    // clock model maps the agent's clock a little differently (see
    // ContiguousStepsAcrossAReconnectAreAllPlaced).
    PublishSteps(*a, 21, 20, agent_base + 3050 * kMs, 100 * kMs);
    auto t = OpenTrainer(*server_);
    ASSERT_TRUE(t->SendHello(ava_, "ava-pad"));
    ASSERT_TRUE(t->Welcome());
    SendFeedback(*t, 3, 1.0, agent_base + 3300 * kMs);  // reaches steps from before the restart
    SendFeedback(*t, 4, 1.0, agent_base + 4500 * kMs);
    auto b = OpenTrainer(*server_);
    ASSERT_TRUE(b->SendHello(ben_, "ben-keys"));
    ASSERT_TRUE(b->Welcome());
    SendFeedback(*b, 1, -1.0, agent_base + 3800 * kMs);
    ASSERT_TRUE(b->Close().ok());
    ASSERT_TRUE(t->Close().ok());
    ASSERT_TRUE(a->Close().ok());
  }
  ASSERT_NO_FATAL_FAILURE(CloseSession());

  const Checked c = Split(LedgerFileRecords());
  ASSERT_EQ(c.steps.size(), 40u);
  ASSERT_EQ(c.feedback.size(), 5u);
  CheckCreditAndLabels(c, [](uint64_t, const std::string& trainer) -> InForce {
    if (trainer == "ben") return {UniformKernel(), 0.5};
    return {GammaKernel(), 1.0};
  });
  for (const v1::Unmatched& u : c.unmatched) {
    ADD_FAILURE() << "unmatched: feedback " << u.feedback_sequence() << " step "
                  << u.step_sequence() << ": " << u.reason();
  }

  const auto live = SqliteLabels(server_->server().ledger_path(), session_, "live");
  ASSERT_EQ(live.size(), 40u);
  ReplayResult same = Replay("recorded", "");
  ASSERT_TRUE(same.status.ok()) << same.status.error_message();
  ASSERT_TRUE(same.comparison);
  EXPECT_EQ(same.comparison->labels(), 40u);
  EXPECT_EQ(same.comparison->changed(), 0u);
  EXPECT_EQ(same.comparison->max_abs_difference(), 0.0);
  EXPECT_EQ(same.comparison->only_live(), 0u);
  EXPECT_EQ(same.comparison->only_replay(), 0u);
  const auto replayed = SqliteLabels(server_->server().ledger_path(), session_, "recorded");
  for (const auto& [step, vw] : live) {
    ASSERT_TRUE(replayed.count(step)) << step;
    EXPECT_EQ(replayed.at(step).first, vw.first) << "step " << step;
    EXPECT_EQ(replayed.at(step).second, vw.second) << "step " << step;
  }
}

// Regression: a step that starts exactly where the agent's previous step
// ended (on the agent's clock) was rejected by the credit engine ("step
// starts before the agent's previous step ended") when the two times were
// mapped to session time by different clock models — after a reconnect, or
// when a probe updated the model between two steps of one stream. Now the
// same instant maps to the same time on one stream, and across connections a
// start within the mapping's uncertainty of the previous end is that end.
TEST_F(CreditTest, ContiguousStepsAcrossAReconnectAreAllPlaced) {
  ASSERT_NO_FATAL_FAILURE(CreateSession("gamma:2,0.28"));
  int64_t next_start = 0;
  for (uint64_t i = 1; i <= 10; ++i) {
    auto a = OpenAgent(*server_);
    ASSERT_TRUE(a->SendHello(rover_, "rover-1"));
    ASSERT_TRUE(a->Welcome());
    if (next_start == 0) next_start = a->Now() + 1000 * kMs;
    PublishSteps(*a, i, 1, next_start, 100 * kMs);
    next_start += 100 * kMs;
    ASSERT_TRUE(a->Close().ok());
  }
  ASSERT_NO_FATAL_FAILURE(CloseSession());
  const Checked c = Split(LedgerFileRecords());
  ASSERT_EQ(c.steps.size(), 10u);
  for (const v1::Unmatched& u : c.unmatched) {
    ADD_FAILURE() << "step " << u.step_sequence() << " rejected: " << u.reason();
  }
  EXPECT_EQ(c.labels.size(), 10u);
}

}  // namespace
}  // namespace tickmark::testing

namespace tickmark::testing {
namespace {

// The ledger keeps kernels as protos (KernelSetting, session default): every
// kind must survive the trip, or a lognormal or ex-Gaussian kernel would be
// stored as an empty proto and replay would credit with nothing.
TEST(KernelProtoTest, EveryKindRoundTripsThroughTheProto) {
  for (const char* text : {"uniform:0.2,4.0", "gamma:2,0.28,0.05", "exponential:2.5,0.1",
                           "empirical:0.1,0.05,1,3,2", "lognormal:-0.6,0.45,0.05",
                           "lognormal:-0.6,0.45,q=0.99", "exgauss:0.4,0.05,0.3"}) {
    std::optional<DelayKernel> k = DelayKernel::Parse(text);
    ASSERT_TRUE(k.has_value()) << text;
    absl::StatusOr<DelayKernel> back = rpc::KernelFromProto(rpc::KernelToProto(*k));
    ASSERT_TRUE(back.ok()) << text << ": " << back.status();
    EXPECT_EQ(*back, *k) << text << " came back as " << back->Describe();
  }
}

}  // namespace
}  // namespace tickmark::testing

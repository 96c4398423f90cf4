// Trainer calibration end to end over a real Train stream (in-process
// server, 127.0.0.1:0): a scripted calibration run, its finish and the
// Calibration record; a resent finish; a run too short to fit; the kernel a
// calibrated trainer gets on joining a session (and does not get where the
// session pins kernels); ApplyCalibration; ListCalibrations and
// GetCalibration with operator and session admin tokens; Replay calibrated.
//
// The worked example below is ours, counted by hand from the matching rule
// in server/core/calibration_match.h (4 s window; an answer judges the
// latest move shown strictly before it, if that move is still open). The
// fits themselves are checked against SciPy in
// tests/reference/delay_fit_reference_test.cc; here only that they are
// present and consistent.
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <map>
#include <string>
#include <vector>

#include "server/rpc/calibration_builder.h"
#include "server/rpc/credit_driver.h"
#include "tests/rpc/test_server.h"

namespace tickmark::testing {
namespace {

constexpr int64_t kSecond = 1'000'000'000;

// One scripted event of the run, on the source's clock (ns from the run's
// start), and what the matching rule makes of it (answers only).
struct Scripted {
  int64_t at_ns = 0;
  bool is_move = false;
  uint32_t move = 0;  // moves: number from 1
  bool approve = false;
  bool practice = false;
  std::string outcome;       // answers: expected outcome
  int64_t matched_move = 0;  // answers: the move number it judges (0: none)
  int64_t delay_ns = 0;      // answers matched to a move: expected delay
};

// The worked example (hand-counted; the delays are a fixed list of values
// typical of human evaluative delays, 0.4-1.0 s, chosen for this test):
//   practice moves 1 (1 s, approve) and 2 (3 s, disapprove);
//   15 real moves 3..17, every 3 s from 10 s, approve on odd numbers;
//   answers: one to practice move 1 (practice), one at 8 s (stray: move 2
//   was shown 5 s before, beyond the 4 s window), 12 right-sign answers
//   (valid), a wrong-sign answer to move 7, a second answer to move 5
//   1.9 s after it was shown (double), and moves 11 and 16 never answered
//   (missed).
// So: moves 15, valid 12, wrong_sign 1, double 1, stray 1, practice 1,
// missed 2.
constexpr int64_t kDelays[] = {412'345'678, 523'456'789,   634'567'891, 487'654'321,
                               745'678'912, 398'765'432,   856'789'123, 567'891'234,
                               689'123'456, 1'012'345'678, 478'912'345, 591'234'567};

std::vector<Scripted> WorkedExample() {
  std::vector<Scripted> s;
  auto move = [&s](int64_t at, uint32_t n, bool approve, bool practice) {
    Scripted e;
    e.at_ns = at;
    e.is_move = true;
    e.move = n;
    e.approve = approve;
    e.practice = practice;
    s.push_back(e);
  };
  auto answer = [&s](int64_t at, bool approve, std::string outcome, int64_t matched,
                     int64_t delay) {
    Scripted e;
    e.at_ns = at;
    e.approve = approve;
    e.outcome = std::move(outcome);
    e.matched_move = matched;
    e.delay_ns = delay;
    s.push_back(e);
  };
  move(1 * kSecond, 1, true, true);
  move(3 * kSecond, 2, false, true);
  answer(1 * kSecond + kSecond / 2, true, "practice", 1, kSecond / 2);
  answer(8 * kSecond, true, "stray", 0, 0);
  size_t next_delay = 0;
  for (int i = 0; i < 15; ++i) {
    const uint32_t n = static_cast<uint32_t>(3 + i);
    const int64_t shown = 10 * kSecond + 3 * kSecond * i;
    const bool approve = n % 2 == 1;
    move(shown, n, approve, false);
    if (n == 11 || n == 16) continue;  // missed
    if (n == 7) {
      answer(shown + kSecond / 2, !approve, "wrong-sign", n, kSecond / 2);
      continue;
    }
    const int64_t d = kDelays[next_delay++];
    answer(shown + d, approve, "valid", n, d);
    if (n == 5) answer(shown + 1'900'000'000, approve, "double", 0, 0);
  }
  std::stable_sort(s.begin(), s.end(),
                   [](const Scripted& a, const Scripted& b) { return a.at_ns < b.at_ns; });
  return s;
}

v1::TrainerMessage CalibrationMsg(uint64_t cseq, const std::string& run, const Scripted& e,
                                  int64_t base_ns) {
  v1::TrainerMessage m;
  auto* c = m.mutable_calibration();
  c->set_client_sequence(cseq);
  c->set_run(run);
  if (e.is_move) {
    c->mutable_move()->set_move(e.move);
    c->mutable_move()->set_shown_source_ns(base_ns + e.at_ns);
    c->mutable_move()->set_approve(e.approve);
    c->mutable_move()->set_practice(e.practice);
    c->mutable_move()->set_detail(e.approve ? "right" : "left");
  } else {
    c->mutable_answer()->set_event_source_ns(base_ns + e.at_ns);
    c->mutable_answer()->set_approve(e.approve);
    c->mutable_answer()->set_input(e.approve ? "key:g" : "key:b");
  }
  return m;
}

v1::TrainerMessage FinishMsg(uint64_t cseq, const std::string& run) {
  v1::TrainerMessage m;
  auto* c = m.mutable_calibration();
  c->set_client_sequence(cseq);
  c->set_run(run);
  c->mutable_finish()->set_min_answers(0);  // 0 means 40
  c->mutable_finish()->set_display_note("terminal; display latency not measured");
  return m;
}

// What the finish of a run brought back: the calibration (if one came
// before the ack) and the ack.
struct Finished {
  std::optional<v1::Calibration> calibration;
  std::optional<v1::Ack> ack;
};

Finished ReadFinish(TrainerStream& t) {
  Finished out;
  auto m = t.Next();
  if (m && m->has_calibration()) {
    out.calibration = m->calibration();
    m = t.Next();
  }
  if (m && m->has_ack()) out.ack = m->ack();
  return out;
}

class CalibrationTest : public ::testing::Test {
 protected:
  void SetUp() override { StartServer(); }

  void StartServer() {
    rpc::LiveService::Options o = TestLiveOptions();
    // Fewer bootstrap resamples than the default 1000 keep the sanitizer
    // builds quick; the counts and delays checked here do not depend on it.
    o.calibration_resamples = 200;
    server_ = std::make_unique<TestServer>(dir_.path(), o);
  }
  void Restart() {
    server_->Shutdown();
    server_.reset();
    StartServer();
  }

  struct Session {
    std::string id, admin;
  };
  Session NewSession(const std::string& title, bool pin_kernels) {
    v1::CreateSessionRequest req;
    req.set_title(title);
    req.set_pin_kernels(pin_kernels);
    v1::CreateSessionResponse resp;
    auto ctx = server_->Context(server_->operator_token());
    grpc::Status s = server_->admin().CreateSession(ctx.get(), req, &resp);
    EXPECT_TRUE(s.ok()) << s.error_message();
    EXPECT_EQ(resp.session().pin_kernels(), pin_kernels);
    return {resp.session().id(), resp.admin_secret()};
  }

  std::unique_ptr<TrainerStream> Join(const std::string& token, const std::string& client_id) {
    auto t = OpenTrainer(*server_);
    EXPECT_TRUE(t->SendHello(token, client_id));
    EXPECT_TRUE(t->Welcome());
    return t;
  }

  // Sends every scripted event (one message each, in time order) and
  // returns the committed sequence of each, by index into `script`.
  std::vector<uint64_t> SendRun(TrainerStream& t, const std::string& run,
                                const std::vector<Scripted>& script, uint64_t first_cseq,
                                int64_t base_ns) {
    std::vector<uint64_t> seqs;
    for (size_t i = 0; i < script.size(); ++i) {
      EXPECT_TRUE(t.Write(CalibrationMsg(first_cseq + i, run, script[i], base_ns)));
      auto ack = t.NextAck();
      EXPECT_TRUE(ack);
      if (!ack) return seqs;
      EXPECT_EQ(ack->code(), 0) << ack->message();
      EXPECT_EQ(ack->client_sequence(), first_cseq + i);
      seqs.push_back(ack->sequence());
    }
    return seqs;
  }

  std::vector<v1::Record> Records(const Session& s) {
    v1::SubscribeRequest req;
    req.set_session_id(s.id);
    req.set_stop_at_end(true);
    auto ctx = server_->Context(s.admin);
    auto reader = server_->live().Subscribe(ctx.get(), req);
    std::vector<v1::Record> out;
    v1::Record r;
    while (reader->Read(&r)) out.push_back(r);
    EXPECT_TRUE(reader->Finish().ok());
    return out;
  }

  // The KernelSetting records of `trainer` in a session.
  std::vector<v1::Record> KernelSettings(const Session& s, const std::string& trainer) {
    std::vector<v1::Record> out;
    for (const v1::Record& r : Records(s)) {
      if (r.has_kernel() && r.kernel().trainer() == trainer) out.push_back(r);
    }
    return out;
  }

  // A feedback now (so that everything appended before it is committed
  // once it is acknowledged); its sequence.
  uint64_t SendFeedback(TrainerStream& t, uint64_t cseq) {
    EXPECT_TRUE(t.Write(Feedback(cseq, 1.0, t.Now())));
    auto ack = t.NextAck();
    EXPECT_TRUE(ack);
    if (!ack) return 0;
    EXPECT_EQ(ack->code(), 0) << ack->message();
    return ack->sequence();
  }

  v1::ReplayComparison Replay(const Session& s, const std::string& name, bool calibrated,
                              std::map<std::string, std::string> trainer_kernels = {}) {
    v1::ReplayRequest req;
    req.set_session_id(s.id);
    req.set_name(name);
    req.set_calibrated(calibrated);
    for (const auto& [t, k] : trainer_kernels) (*req.mutable_trainer_kernels())[t] = k;
    auto ctx = server_->Context(s.admin);
    auto reader = server_->admin().Replay(ctx.get(), req);
    v1::ReplayProgress p;
    v1::ReplayComparison out;
    while (reader->Read(&p)) {
      if (p.finished()) out = p.result();
    }
    grpc::Status st = reader->Finish();
    EXPECT_TRUE(st.ok()) << st.error_message();
    return out;
  }

  // Runs the worked example for trainer "ava" in a fresh session and
  // returns the calibration.
  v1::Calibration Calibrate() {
    calib_ = NewSession("dock rover, calibration", false);
    ava_token_ = server_->IssueToken(calib_.id, v1::ROLE_TRAINER, "ava", calib_.admin);
    auto t = Join(ava_token_, "keys:ava:1");
    script_ = WorkedExample();
    // The run lies in the last 70 s of the source's clock: in the past, well
    // within the 600 s an event may be old.
    base_ns_ = t->Now() - 70 * kSecond;
    seqs_ = SendRun(*t, "run-1", script_, 1, base_ns_);
    EXPECT_EQ(seqs_.size(), script_.size());
    finish_cseq_ = script_.size() + 1;
    EXPECT_TRUE(t->Write(FinishMsg(finish_cseq_, "run-1")));
    Finished f = ReadFinish(*t);
    EXPECT_TRUE(f.ack);
    EXPECT_TRUE(f.calibration);
    if (!f.ack || !f.calibration) return {};
    EXPECT_EQ(f.ack->code(), 0) << f.ack->message();
    EXPECT_FALSE(f.ack->duplicate());
    finish_seq_ = f.ack->sequence();
    // A resent finish (same client sequence): the same calibration again.
    EXPECT_TRUE(t->Write(FinishMsg(finish_cseq_, "run-1")));
    Finished again = ReadFinish(*t);
    EXPECT_TRUE(again.ack && again.ack->duplicate()) << (again.ack ? again.ack->message() : "");
    EXPECT_TRUE(again.calibration);
    if (again.calibration) {
      EXPECT_EQ(again.calibration->SerializeAsString(), f.calibration->SerializeAsString());
    }
    EXPECT_TRUE(t->Close().ok());
    return *f.calibration;
  }

  TempDir dir_;
  std::unique_ptr<TestServer> server_;
  Session calib_;
  std::string ava_token_;
  std::vector<Scripted> script_;
  std::vector<uint64_t> seqs_;
  int64_t base_ns_ = 0;
  uint64_t finish_cseq_ = 0, finish_seq_ = 0;
};

TEST_F(CalibrationTest, ScriptedRunGivesTheWorkedExampleAndAFit) {
  const v1::Calibration c = Calibrate();
  ASSERT_FALSE(c.id().empty());
  EXPECT_EQ(c.id().size(), 10u);  // "c-" + 8 hex digits
  EXPECT_EQ(c.id().rfind("c-", 0), 0u);
  EXPECT_EQ(c.trainer(), "ava");
  EXPECT_EQ(c.client_id(), "keys:ava:1");
  EXPECT_EQ(c.client_sequence(), finish_cseq_);
  EXPECT_EQ(c.run(), "run-1");
  // The counts of the worked example (hand-counted, see WorkedExample).
  EXPECT_EQ(c.moves(), 15u);
  EXPECT_EQ(c.valid(), 12u);
  EXPECT_EQ(c.wrong_sign(), 1u);
  EXPECT_EQ(c.double_answers(), 1u);
  EXPECT_EQ(c.stray(), 1u);
  EXPECT_EQ(c.practice_answers(), 1u);
  EXPECT_EQ(c.missed(), 2u);

  // One match per answer, in time order, naming the records' sequences.
  std::map<uint32_t, uint64_t> move_seq;
  std::vector<size_t> answers;
  for (size_t i = 0; i < script_.size(); ++i) {
    if (script_[i].is_move) {
      move_seq[script_[i].move] = seqs_[i];
    } else {
      answers.push_back(i);
    }
  }
  ASSERT_EQ(c.matches_size(), static_cast<int>(answers.size()));
  std::vector<int64_t> valid_delays;
  for (size_t k = 0; k < answers.size(); ++k) {
    const Scripted& e = script_[answers[k]];
    const v1::CalibrationMatch& m = c.matches(static_cast<int>(k));
    SCOPED_TRACE(::testing::Message() << "answer " << k << " at " << e.at_ns << " ns");
    EXPECT_EQ(m.answer_sequence(), seqs_[answers[k]]);
    EXPECT_EQ(m.outcome(), e.outcome);
    EXPECT_EQ(m.move_sequence(),
              e.matched_move ? move_seq[static_cast<uint32_t>(e.matched_move)] : 0u);
    EXPECT_EQ(m.delay_ns(), e.delay_ns);  // to the nanosecond: source clock differences
    if (e.outcome == "valid") valid_delays.push_back(e.delay_ns);
  }
  // The fitted delays are the scripted ones, in time order.
  ASSERT_EQ(c.delays_s_size(), 12);
  ASSERT_EQ(valid_delays.size(), 12u);
  for (int i = 0; i < 12; ++i) {
    EXPECT_EQ(valid_delays[static_cast<size_t>(i)], kDelays[i]);
    EXPECT_EQ(std::llround(c.delays_s(i) * 1e9), kDelays[i]) << "delay " << i;
  }

  // Every family, in a fixed order; the chosen one has the lowest AIC.
  ASSERT_EQ(c.fits_size(), 5);
  const char* families[] = {"gamma", "shifted-gamma", "lognormal", "exgauss", "lognormal-mixture"};
  double best = INFINITY;
  for (int i = 0; i < 5; ++i) {
    EXPECT_EQ(c.fits(i).family(), families[i]);
    if (c.fits(i).has_kernel()) best = std::min(best, c.fits(i).aic());
  }
  ASSERT_LT(c.chosen(), 5u);
  const v1::CalibrationFit& chosen = c.fits(static_cast<int>(c.chosen()));
  ASSERT_TRUE(chosen.has_kernel()) << chosen.error();
  EXPECT_EQ(chosen.aic(), best);
  EXPECT_EQ(c.kernel_description(), chosen.kernel_description());
  EXPECT_EQ(c.kernel().SerializeAsString(), chosen.kernel().SerializeAsString());
  // The mean of the fitted distribution lies near the sample mean (0.62 s).
  EXPECT_GT(chosen.mean_s(), 0.45);
  EXPECT_LT(chosen.mean_s(), 0.8);
  EXPECT_LE(c.mean_interval().low_s(), c.mean_interval().high_s());
  EXPECT_GT(c.mean_interval().high_s(), 0);
  EXPECT_EQ(c.min_answers(), 40u);  // 0 in the finish means 40
  // c / sqrt(n) with c = 1.36 (delay_fit.h).
  EXPECT_NEAR(c.ks_threshold(), 1.36 / std::sqrt(12.0), 1e-12);
  ASSERT_GE(c.warnings_size(), 1);  // 12 < 40 valid answers
  EXPECT_NE(c.warnings(0).find("12 valid answers"), std::string::npos) << c.warnings(0);
  EXPECT_EQ(c.display_note(), "terminal; display latency not measured");

  // Stored as a Calibration record at the finish's sequence, with the
  // moves and answers as CalibrationEvent records before it.
  auto records = Records(calib_);
  const v1::Record* stored = nullptr;
  size_t events = 0;
  for (const v1::Record& r : records) {
    if (r.has_calibration_event()) {
      ++events;
      EXPECT_LT(r.sequence(), finish_seq_);
      EXPECT_EQ(r.calibration_event().trainer(), "ava");
      EXPECT_EQ(r.calibration_event().run(), "run-1");
    }
    if (r.has_calibration()) {
      EXPECT_EQ(stored, nullptr) << "a resent finish stored a second calibration";
      stored = &r;
    }
  }
  EXPECT_EQ(events, script_.size());
  ASSERT_NE(stored, nullptr);
  EXPECT_EQ(stored->sequence(), finish_seq_);
  EXPECT_EQ(stored->calibration().SerializeAsString(), c.SerializeAsString());
}

TEST_F(CalibrationTest, TooFewValidAnswersIsRefusedAndNothingStored) {
  Session s = NewSession("short run", false);
  const std::string token = server_->IssueToken(s.id, v1::ROLE_TRAINER, "ben", s.admin);
  auto t = Join(token, "keys:ben:1");
  // Two moves, two right answers: 2 valid answers, fewer than the 3 a fit needs.
  std::vector<Scripted> script(4);
  script[0] = {1 * kSecond, true, 1, true, false, "", 0, 0};
  script[1] = {1 * kSecond + 400'000'000, false, 0, true, false, "valid", 1, 400'000'000};
  script[2] = {3 * kSecond, true, 2, false, false, "", 0, 0};
  script[3] = {3 * kSecond + 500'000'000, false, 0, false, false, "valid", 2, 500'000'000};
  SendRun(*t, "short", script, 1, t->Now() - 10 * kSecond);
  ASSERT_TRUE(t->Write(FinishMsg(5, "short")));
  Finished f = ReadFinish(*t);
  EXPECT_FALSE(f.calibration);
  ASSERT_TRUE(f.ack);
  EXPECT_EQ(f.ack->code(), static_cast<int>(grpc::StatusCode::FAILED_PRECONDITION));
  EXPECT_NE(f.ack->message().find("2 valid answers"), std::string::npos) << f.ack->message();
  // A move number 0 and a bad run id are refused.
  v1::TrainerMessage bad = CalibrationMsg(6, "short", script[0], t->Now());
  bad.mutable_calibration()->mutable_move()->set_move(0);
  ASSERT_TRUE(t->Write(bad));
  auto ack = t->NextAck();
  ASSERT_TRUE(ack);
  EXPECT_EQ(ack->code(), static_cast<int>(grpc::StatusCode::INVALID_ARGUMENT));
  bad = CalibrationMsg(7, "short run!", script[0], t->Now());
  ASSERT_TRUE(t->Write(bad));
  ack = t->NextAck();
  ASSERT_TRUE(ack);
  EXPECT_EQ(ack->code(), static_cast<int>(grpc::StatusCode::INVALID_ARGUMENT));
  EXPECT_TRUE(t->Close().ok());
  for (const v1::Record& r : Records(s)) EXPECT_FALSE(r.has_calibration());
  v1::ListCalibrationsRequest req;
  v1::ListCalibrationsResponse resp;
  auto ctx = server_->Context(server_->operator_token());
  ASSERT_TRUE(server_->admin().ListCalibrations(ctx.get(), req, &resp).ok());
  EXPECT_EQ(resp.calibrations_size(), 0);
}

TEST_F(CalibrationTest, JoiningASessionAppliesTheCalibrationUnlessKernelsArePinned) {
  const v1::Calibration c = Calibrate();
  ASSERT_FALSE(c.id().empty());

  // A new session that does not pin kernels: ava's kernel is her calibration's,
  // set before her first feedback there.
  Session open = NewSession("dock rover, day 2", false);
  const std::string ava2 = server_->IssueToken(open.id, v1::ROLE_TRAINER, "ava", open.admin);
  {
    auto t = Join(ava2, "keys:ava:2");
    const uint64_t fb = SendFeedback(*t, 1);
    auto t2 = Join(ava2, "keys:ava:3");  // a second stream: still one setting
    SendFeedback(*t2, 1);
    EXPECT_TRUE(t2->Close().ok());
    EXPECT_TRUE(t->Close().ok());
    auto settings = KernelSettings(open, "ava");
    ASSERT_EQ(settings.size(), 1u);
    const v1::KernelSetting& ks = settings[0].kernel();
    EXPECT_EQ(ks.calibration(), c.id());
    EXPECT_EQ(ks.author(), "calibration");
    EXPECT_EQ(ks.weight(), 1.0);
    EXPECT_EQ(ks.description(), c.kernel_description());
    EXPECT_EQ(ks.kernel().SerializeAsString(), c.kernel().SerializeAsString());
    EXPECT_LT(settings[0].sequence(), fb);
  }

  // A session that pins kernels: nothing is applied on joining.
  Session pinned = NewSession("dock rover, pinned", true);
  {
    v1::GetSessionRequest req;
    req.set_session_id(pinned.id);
    v1::SessionSummary resp;
    auto ctx = server_->Context(pinned.admin);
    ASSERT_TRUE(server_->admin().GetSession(ctx.get(), req, &resp).ok());
    EXPECT_TRUE(resp.session().pin_kernels());
  }
  const std::string ava3 = server_->IssueToken(pinned.id, v1::ROLE_TRAINER, "ava", pinned.admin);
  {
    auto t = Join(ava3, "keys:ava:4");
    SendFeedback(*t, 1);
    EXPECT_TRUE(t->Close().ok());
  }
  EXPECT_TRUE(KernelSettings(pinned, "ava").empty());

  // Replay: recorded kernels (the default for ava), then calibrated (her
  // calibration), then calibrated with an explicit kernel for her (it wins).
  const v1::ReplayComparison recorded = Replay(pinned, "recorded", false);
  // Canonical text is DelayKernel::Describe() (what KernelSetting.description holds).
  EXPECT_EQ(recorded.trainer_kernels().at("ava"), rpc::ParseKernel("uniform:0.2,4")->Describe());
  EXPECT_EQ(recorded.trainer_calibrations().count("ava"), 0u);
  const v1::ReplayComparison calibrated = Replay(pinned, "calibrated", true);
  EXPECT_EQ(calibrated.trainer_kernels().at("ava"), c.kernel_description());
  EXPECT_EQ(calibrated.trainer_calibrations().at("ava"), c.id());
  const v1::ReplayComparison explicit_kernel =
      Replay(pinned, "explicit", true, {{"ava", "gamma:2,0.28"}});
  EXPECT_EQ(explicit_kernel.trainer_kernels().at("ava"),
            rpc::ParseKernel("gamma:2,0.28")->Describe());
  EXPECT_EQ(explicit_kernel.trainer_calibrations().count("ava"), 0u);

  // ApplyCalibration by the session's admin sets it explicitly.
  {
    v1::ApplyCalibrationRequest req;
    req.set_session_id(pinned.id);
    req.set_calibration_id(c.id());
    req.set_weight(0.5);
    v1::SetKernelResponse resp;
    auto ctx = server_->Context(pinned.admin);
    grpc::Status s = server_->admin().ApplyCalibration(ctx.get(), req, &resp);
    ASSERT_TRUE(s.ok()) << s.error_message();
    EXPECT_EQ(resp.setting().trainer(), "ava");
    EXPECT_EQ(resp.setting().calibration(), c.id());
    EXPECT_EQ(resp.setting().weight(), 0.5);
    EXPECT_EQ(resp.setting().description(), c.kernel_description());
    auto settings = KernelSettings(pinned, "ava");
    ASSERT_EQ(settings.size(), 1u);
    EXPECT_EQ(settings[0].sequence(), resp.sequence());
    EXPECT_EQ(settings[0].kernel().calibration(), c.id());
    // The replay of the recorded kernels now names the calibration too.
    const v1::ReplayComparison after = Replay(pinned, "after-apply", false);
    EXPECT_EQ(after.trainer_kernels().at("ava"), c.kernel_description());
    EXPECT_EQ(after.trainer_calibrations().at("ava"), c.id());
  }
  {
    v1::ApplyCalibrationRequest req;
    req.set_session_id(pinned.id);
    req.set_calibration_id("c-00000000");
    v1::SetKernelResponse resp;
    auto ctx = server_->Context(pinned.admin);
    EXPECT_EQ(server_->admin().ApplyCalibration(ctx.get(), req, &resp).error_code(),
              grpc::StatusCode::NOT_FOUND);
  }
  {
    v1::CloseSessionRequest close;
    close.set_session_id(open.id);
    v1::Session closed;
    auto ctx = server_->Context(open.admin);
    ASSERT_TRUE(server_->admin().CloseSession(ctx.get(), close, &closed).ok());
    v1::ApplyCalibrationRequest req;
    req.set_session_id(open.id);
    req.set_calibration_id(c.id());
    v1::SetKernelResponse resp;
    auto ctx2 = server_->Context(server_->operator_token());
    EXPECT_EQ(server_->admin().ApplyCalibration(ctx2.get(), req, &resp).error_code(),
              grpc::StatusCode::FAILED_PRECONDITION);
  }
}

TEST_F(CalibrationTest, AfterARestartJoiningStillAppliesItButNotOverAnAdminsKernel) {
  const v1::Calibration c = Calibrate();
  ASSERT_FALSE(c.id().empty());
  Restart();
  // The calibration index survives a restart.
  Session s = NewSession("dock rover, after restart", false);
  const std::string ava = server_->IssueToken(s.id, v1::ROLE_TRAINER, "ava", s.admin);
  const std::string ben = server_->IssueToken(s.id, v1::ROLE_TRAINER, "ben", s.admin);
  {
    auto t = Join(ava, "keys:ava:9");
    SendFeedback(*t, 1);
    EXPECT_TRUE(t->Close().ok());
  }
  auto settings = KernelSettings(s, "ava");
  ASSERT_EQ(settings.size(), 1u);
  EXPECT_EQ(settings[0].kernel().calibration(), c.id());

  // A trainer whose kernel an admin set in the session before she joined
  // keeps it: the calibration is applied only where she has no setting.
  Session set_first = NewSession("admin kernel first", false);
  const std::string ava2 =
      server_->IssueToken(set_first.id, v1::ROLE_TRAINER, "ava", set_first.admin);
  {
    v1::SetKernelRequest req;
    req.set_session_id(set_first.id);
    req.set_trainer("ava");
    req.set_kernel("gamma:2,0.28");
    v1::SetKernelResponse resp;
    auto ctx = server_->Context(set_first.admin);
    ASSERT_TRUE(server_->admin().SetKernel(ctx.get(), req, &resp).ok());
  }
  {
    auto t = Join(ava2, "keys:ava:10");
    SendFeedback(*t, 1);
    EXPECT_TRUE(t->Close().ok());
  }
  settings = KernelSettings(set_first, "ava");
  ASSERT_EQ(settings.size(), 1u);
  EXPECT_EQ(settings[0].kernel().calibration(), "");
  EXPECT_EQ(settings[0].kernel().description(), rpc::ParseKernel("gamma:2,0.28")->Describe());
  // ben has no calibration: nothing is applied for him.
  {
    auto t = Join(ben, "keys:ben:9");
    SendFeedback(*t, 1);
    EXPECT_TRUE(t->Close().ok());
  }
  EXPECT_TRUE(KernelSettings(s, "ben").empty());
}

TEST_F(CalibrationTest, AResentEventWithOtherContentIsRefused) {
  Session s = NewSession("resend", false);
  const std::string token = server_->IssueToken(s.id, v1::ROLE_TRAINER, "cleo", s.admin);
  auto t = Join(token, "keys:cleo:1");
  const int64_t base = t->Now() - 10 * kSecond;
  Scripted move;
  move.at_ns = kSecond;
  move.is_move = true;
  move.move = 1;
  move.approve = true;
  ASSERT_TRUE(t->Write(CalibrationMsg(1, "r", move, base)));
  auto first = t->NextAck();
  ASSERT_TRUE(first);
  ASSERT_EQ(first->code(), 0) << first->message();
  // The same bytes again: a duplicate with the original's sequence.
  ASSERT_TRUE(t->Write(CalibrationMsg(1, "r", move, base)));
  auto again = t->NextAck();
  ASSERT_TRUE(again);
  EXPECT_EQ(again->code(), 0);
  EXPECT_TRUE(again->duplicate());
  EXPECT_EQ(again->sequence(), first->sequence());
  // Other content under the same client sequence: refused, not stored.
  move.move = 2;
  ASSERT_TRUE(t->Write(CalibrationMsg(1, "r", move, base)));
  auto other = t->NextAck();
  ASSERT_TRUE(other);
  EXPECT_EQ(other->code(), static_cast<int>(grpc::StatusCode::ALREADY_EXISTS));
  EXPECT_NE(other->message().find("move 2"), std::string::npos) << other->message();
  // A finish under a client sequence a move holds: refused too.
  ASSERT_TRUE(t->Write(FinishMsg(1, "r")));
  Finished f = ReadFinish(*t);
  EXPECT_FALSE(f.calibration);
  ASSERT_TRUE(f.ack);
  EXPECT_EQ(f.ack->code(), static_cast<int>(grpc::StatusCode::ALREADY_EXISTS));
  EXPECT_TRUE(t->Close().ok());
}

TEST_F(CalibrationTest, ListAndGetFollowTheTokens) {
  const v1::Calibration c = Calibrate();
  ASSERT_FALSE(c.id().empty());
  auto list = [this](const std::string& token, const std::string& trainer) {
    v1::ListCalibrationsRequest req;
    req.set_trainer(trainer);
    v1::ListCalibrationsResponse resp;
    auto ctx = server_->Context(token);
    EXPECT_TRUE(server_->admin().ListCalibrations(ctx.get(), req, &resp).ok());
    return resp;
  };
  auto get = [this](const std::string& token, const std::string& id, const std::string& trainer,
                    v1::Calibration* out) {
    v1::GetCalibrationRequest req;
    req.set_id(id);
    req.set_trainer(trainer);
    auto ctx = server_->Context(token);
    return server_->admin().GetCalibration(ctx.get(), req, out).error_code();
  };
  // The operator sees every calibration.
  v1::ListCalibrationsResponse all = list(server_->operator_token(), "");
  ASSERT_EQ(all.calibrations_size(), 1);
  const v1::CalibrationSummary& sum = all.calibrations(0);
  EXPECT_EQ(sum.id(), c.id());
  EXPECT_EQ(sum.trainer(), "ava");
  EXPECT_EQ(sum.session_id(), calib_.id);
  EXPECT_EQ(sum.sequence(), finish_seq_);
  EXPECT_EQ(sum.family(), c.fits(static_cast<int>(c.chosen())).family());
  EXPECT_EQ(sum.kernel_description(), c.kernel_description());
  EXPECT_EQ(sum.valid(), 12u);
  EXPECT_TRUE(sum.warning());
  EXPECT_EQ(list(server_->operator_token(), "ben").calibrations_size(), 0);
  v1::Calibration got;
  EXPECT_EQ(get(server_->operator_token(), c.id(), "", &got), grpc::StatusCode::OK);
  EXPECT_EQ(got.SerializeAsString(), c.SerializeAsString());
  EXPECT_EQ(get(server_->operator_token(), "", "ava", &got), grpc::StatusCode::OK);
  EXPECT_EQ(got.id(), c.id());
  EXPECT_EQ(get(server_->operator_token(), "", "ben", &got), grpc::StatusCode::NOT_FOUND);
  EXPECT_EQ(get(server_->operator_token(), "", "", &got), grpc::StatusCode::INVALID_ARGUMENT);

  // The admin of the session it was measured in (ava has a token there).
  EXPECT_EQ(list(calib_.admin, "").calibrations_size(), 1);
  // The admin of a session where only ben trains sees none of ava's.
  Session other = NewSession("ben only", false);
  server_->IssueToken(other.id, v1::ROLE_TRAINER, "ben", other.admin);
  EXPECT_EQ(list(other.admin, "").calibrations_size(), 0);
  EXPECT_EQ(get(other.admin, c.id(), "", &got), grpc::StatusCode::NOT_FOUND);
  // A trainer token may not read calibrations.
  v1::ListCalibrationsRequest req;
  v1::ListCalibrationsResponse resp;
  auto ctx = server_->Context(ava_token_);
  EXPECT_EQ(server_->admin().ListCalibrations(ctx.get(), req, &resp).error_code(),
            grpc::StatusCode::PERMISSION_DENIED);
}

// The bootstrap seed depends on the client and the run only, so a run's
// intervals are reproducible.
TEST(CalibrationSeedTest, DependsOnClientAndRun) {
  EXPECT_EQ(rpc::CalibrationSeed("keys:ava:1", "run-1"),
            rpc::CalibrationSeed("keys:ava:1", "run-1"));
  EXPECT_NE(rpc::CalibrationSeed("keys:ava:1", "run-1"),
            rpc::CalibrationSeed("keys:ava:1", "run-2"));
  // FNV-1a 64 of the empty string plus "/" is the basis run through '/':
  // (14695981039346656037 ^ 0x2f) * 1099511628211 mod 2^64 (FNV spec, from memory).
  EXPECT_EQ(rpc::CalibrationSeed("", ""), (14695981039346656037ull ^ 0x2full) * 1099511628211ull);
}

// The builder alone: three valid answers with one and the same delay give
// no fit (every family needs spread), so nothing would be stored.
TEST(CalibrationBuilderTest, EqualDelaysFitNoFamily) {
  std::vector<v1::Record> events;
  uint64_t seq = 1;
  for (int i = 0; i < 3; ++i) {
    v1::Record move;
    move.set_sequence(seq++);
    move.mutable_calibration_event()->set_kind(v1::CalibrationEvent::KIND_MOVE);
    move.mutable_calibration_event()->set_move(static_cast<uint32_t>(i + 1));
    move.mutable_calibration_event()->set_at_source_ns((i + 1) * 3 * kSecond);
    move.mutable_calibration_event()->set_approve(true);
    events.push_back(move);
    v1::Record answer;
    answer.set_sequence(seq++);
    answer.mutable_calibration_event()->set_kind(v1::CalibrationEvent::KIND_ANSWER);
    answer.mutable_calibration_event()->set_at_source_ns((i + 1) * 3 * kSecond + kSecond / 2);
    answer.mutable_calibration_event()->set_approve(true);
    events.push_back(answer);
  }
  rpc::CalibrationRequest req;
  req.run = "flat";
  req.bootstrap_resamples = 0;
  auto c = rpc::BuildCalibration(events, req);
  ASSERT_FALSE(c.ok());
  EXPECT_EQ(c.status().code(), absl::StatusCode::kFailedPrecondition);
  EXPECT_NE(c.status().message().find("no delay family fits"), std::string::npos)
      << c.status().message();
  // One more answer with another delay: now it fits, with no intervals
  // (bootstrap off) and a too-few-answers warning (4 < 40).
  v1::Record move;
  move.set_sequence(seq++);
  move.mutable_calibration_event()->set_kind(v1::CalibrationEvent::KIND_MOVE);
  move.mutable_calibration_event()->set_move(4);
  move.mutable_calibration_event()->set_at_source_ns(12 * kSecond);
  events.push_back(move);
  v1::Record answer;
  answer.set_sequence(seq++);
  answer.mutable_calibration_event()->set_kind(v1::CalibrationEvent::KIND_ANSWER);
  answer.mutable_calibration_event()->set_at_source_ns(12 * kSecond + 700'000'000);
  events.push_back(answer);
  c = rpc::BuildCalibration(events, req);
  ASSERT_TRUE(c.ok()) << c.status().message();
  EXPECT_EQ(c->valid(), 4u);
  EXPECT_FALSE(c->has_mean_interval());
  EXPECT_EQ(c->warnings_size() >= 1, true);
  EXPECT_EQ(c->matches(3).move_sequence(), 7u);
  EXPECT_EQ(c->matches(3).answer_sequence(), 8u);
}

}  // namespace
}  // namespace tickmark::testing

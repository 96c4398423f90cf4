// CalibrationTask (clients/common/calibration_task.h) driven by a fake
// display, a scripted trainer and a fake clock: no real waiting, no timing
// assertions. The expected counts come from the matching rule as stated in
// server/core/calibration_match.h, worked out by hand for each script.
#include "clients/common/calibration_task.h"

#include <algorithm>
#include <map>
#include <string>
#include <vector>

#include "gtest/gtest.h"

namespace tickmark::client {
namespace {

constexpr int64_t kSecond = 1'000'000'000;

// A scripted trainer: for each drawn move, `plan` says which answers follow
// it (delay in seconds, sign). Wait() moves the fake clock to the next
// planned answer or to `until`, whichever is first.
struct Plan {
  double delay_s = 0;
  bool approve = false;
};

class FakeTrainer final : public CalibrationDisplay, public CalibrationInputSource {
 public:
  using PlanFn = std::function<std::vector<Plan>(const CalibrationMoveView&)>;
  FakeTrainer(FakeMonotonic* clock, PlanFn plan) : clock_(clock), plan_(std::move(plan)) {}

  int64_t DrawMove(const CalibrationMoveView& move) override {
    const int64_t shown = clock_->NowNanos();
    drawn.push_back(move);
    shown_ns.push_back(shown);
    for (const Plan& p : plan_(move)) {
      pending_.emplace(shown + static_cast<int64_t>(p.delay_s * kSecond), p.approve);
    }
    return shown;
  }
  void ShowProgress(const CalibrationProgress& p) override { last = p; }

  CalibrationInput Wait(int64_t until_ns) override {
    ++waits;
    CalibrationInput in;
    if (quit_after_answers >= 0 && answered >= quit_after_answers) {
      in.quit = true;
      return in;
    }
    if (!pending_.empty() && pending_.begin()->first <= until_ns) {
      const auto [at, approve] = *pending_.begin();
      pending_.erase(pending_.begin());
      clock_->Set(std::max(at, clock_->NowNanos()));
      in.answers.push_back({at, approve, approve ? "key:f" : "key:j"});
      ++answered;
      return in;
    }
    clock_->Set(std::max(until_ns, clock_->NowNanos()));
    return in;
  }

  std::vector<CalibrationMoveView> drawn;
  std::vector<int64_t> shown_ns;
  CalibrationProgress last;
  int waits = 0;
  int answered = 0;
  int quit_after_answers = -1;  // quit once this many answers were given

 private:
  FakeMonotonic* clock_;
  PlanFn plan_;
  std::multimap<int64_t, bool> pending_;
};

CalibrationTaskOptions Small() {
  CalibrationTaskOptions o;
  o.run = "cal-test";
  o.answers = 6;
  o.practice = 2;
  o.seed = 42;
  return o;
}

struct Recorder {
  std::vector<tickmark::v1::CalibrationMessage> sent;
  CalibrationTask::Send Fn() {
    return [this](tickmark::v1::CalibrationMessage m) {
      sent.push_back(std::move(m));
      return absl::OkStatus();
    };
  }
};

TEST(CalibrationTaskTest, ScheduleStaysInBoundsAndIsAboutHalfApprove) {
  CalibrationTaskOptions o = Small();
  o.answers = 1000;
  o.practice = 0;
  CalibrationTask task(o);
  task.Start(0);
  int64_t last = 0;
  int approvals = 0;
  constexpr int kMoves = 2000;
  for (int i = 0; i < kMoves; ++i) {
    const int64_t due = task.next_due_ns();
    const CalibrationMoveView m = task.next_move();
    // Intervals uniform in [0.8 s, 3 s] (the defaults), from the last move.
    EXPECT_GE(due - last, static_cast<int64_t>(0.8 * kSecond)) << i;
    EXPECT_LE(due - last, static_cast<int64_t>(3.0 * kSecond)) << i;
    EXPECT_LT(m.to_cell, o.track_cells);
    EXPECT_EQ(m.right, m.to_cell > m.from_cell) << i;
    EXPECT_NE(m.to_cell, m.from_cell);
    EXPECT_EQ(m.approve, m.right);  // the default rule: approve right
    EXPECT_EQ(m.number, static_cast<uint32_t>(i + 1));
    approvals += m.approve ? 1 : 0;
    task.MoveShown(due);
    last = due;
  }
  // Symmetric walk: about half approvals. The bound is loose on purpose
  // (a fixed seed; any seed should land well inside it).
  EXPECT_GT(approvals, kMoves * 0.4);
  EXPECT_LT(approvals, kMoves * 0.6);
}

TEST(CalibrationTaskTest, SameSeedSameScheduleOtherSeedOther) {
  auto schedule = [](uint64_t seed) {
    CalibrationTaskOptions o = Small();
    o.seed = seed;
    CalibrationTask task(o);
    task.Start(0);
    std::vector<std::pair<int64_t, bool>> s;
    for (int i = 0; i < 20; ++i) {
      s.emplace_back(task.next_due_ns(), task.next_move().right);
      task.MoveShown(task.next_due_ns());
    }
    return s;
  };
  EXPECT_EQ(schedule(7), schedule(7));
  EXPECT_NE(schedule(7), schedule(8));
}

TEST(CalibrationTaskTest, PerfectTrainerStopsAtEnoughAnswersAfterPractice) {
  FakeMonotonic clock(5 * kSecond);
  FakeTrainer trainer(&clock, [](const CalibrationMoveView& m) {
    return std::vector<Plan>{{0.5, m.approve}};
  });
  Recorder rec;
  CalibrationTask task(Small());
  const CalibrationRunResult r = task.Run(clock, trainer, trainer, rec.Fn());
  EXPECT_EQ(r.stop, CalibrationStop::kEnoughAnswers);
  // Two practice moves, then six real ones, each answered right.
  ASSERT_EQ(trainer.drawn.size(), 8u);
  EXPECT_TRUE(trainer.drawn[0].practice);
  EXPECT_TRUE(trainer.drawn[1].practice);
  EXPECT_EQ(trainer.drawn[1].index, 2u);
  EXPECT_FALSE(trainer.drawn[2].practice);
  EXPECT_EQ(trainer.drawn[2].index, 1u);
  EXPECT_EQ(r.progress.valid, 6u);
  EXPECT_EQ(r.progress.practice_answers, 2u);
  EXPECT_EQ(r.progress.moves, 6u);
  EXPECT_EQ(r.progress.missed, 0u);
  EXPECT_EQ(r.progress.wrong_sign, 0u);
  EXPECT_FALSE(r.progress.in_practice);
  EXPECT_EQ(r.progress.last, "valid 0.50 s");

  // Messages: move, answer, move, answer, ... each with the run id; moves
  // numbered from 1, answer times on the source clock.
  ASSERT_EQ(rec.sent.size(), 16u);
  for (size_t i = 0; i < rec.sent.size(); ++i) {
    const auto& m = rec.sent[i];
    EXPECT_EQ(m.run(), "cal-test");
    EXPECT_EQ(m.client_sequence(), 0u);  // the stream client numbers them
    if (i % 2 == 0) {
      ASSERT_TRUE(m.has_move()) << i;
      EXPECT_EQ(m.move().move(), i / 2 + 1);
      EXPECT_EQ(m.move().practice(), i < 4);
      EXPECT_EQ(m.move().shown_source_ns(), trainer.shown_ns[i / 2]);
      EXPECT_EQ(m.move().detail(), m.move().approve() ? "right" : "left");
    } else {
      ASSERT_TRUE(m.has_answer()) << i;
      EXPECT_EQ(m.answer().event_source_ns(), trainer.shown_ns[i / 2] + kSecond / 2);
      EXPECT_EQ(m.answer().approve(), rec.sent[i - 1].move().approve());
      EXPECT_EQ(m.answer().input(), m.answer().approve() ? "key:f" : "key:j");
    }
  }
  const tickmark::v1::CalibrationMessage fin = task.Finish();
  ASSERT_TRUE(fin.has_finish());
  EXPECT_EQ(fin.run(), "cal-test");
  EXPECT_EQ(fin.finish().min_answers(), 6u);
  EXPECT_EQ(fin.finish().display_note(), kDisplayLatencyNote);
}

// Wrong signs, a miss, a double and a late answer, counted by the rule of
// calibration_match.h: wrong sign closes the move without a delay; a second
// answer to an answered move is a double; an unanswered move is missed; an
// answer more than 4 s after the latest move is stray.
TEST(CalibrationTaskTest, LiveCountsFollowTheMatchingRule) {
  FakeMonotonic clock(5 * kSecond);
  CalibrationTaskOptions o = Small();
  o.answers = 5;
  o.practice = 1;
  o.min_interval_s = 5.0;  // room for a late answer before the next move
  o.max_interval_s = 6.0;
  FakeTrainer trainer(&clock, [](const CalibrationMoveView& m) -> std::vector<Plan> {
    if (m.practice) return {{0.4, !m.approve}};  // practice: wrong, not counted
    switch (m.index) {
      case 1:
        return {{0.5, !m.approve}};  // wrong sign
      case 2:
        return {};  // missed
      case 3:
        return {{0.6, m.approve}, {0.9, m.approve}};  // valid + double
      case 4:
        return {{4.5, m.approve}};  // late: stray, move missed
      default:
        return {{0.7, m.approve}};  // valid
    }
  });
  Recorder rec;
  CalibrationTask task(o);
  const CalibrationRunResult r = task.Run(clock, trainer, trainer, rec.Fn());
  EXPECT_EQ(r.stop, CalibrationStop::kEnoughAnswers);
  // Real moves: 1 wrong, 2 missed, 3 valid, 4 missed (late), 5..8 valid.
  EXPECT_EQ(r.progress.moves, 8u);
  EXPECT_EQ(r.progress.valid, 5u);
  EXPECT_EQ(r.progress.wrong_sign, 1u);
  EXPECT_EQ(r.progress.missed, 2u);
  EXPECT_EQ(r.progress.double_answers, 1u);
  EXPECT_EQ(r.progress.stray, 1u);
  EXPECT_EQ(r.progress.practice_answers, 1u);
  EXPECT_EQ(r.progress.answers, 9u);
}

TEST(CalibrationTaskTest, SilentTrainerStopsAtMoveCapAfterTheLastWindow) {
  FakeMonotonic clock(5 * kSecond);
  FakeTrainer trainer(&clock, [](const CalibrationMoveView&) { return std::vector<Plan>{}; });
  CalibrationTaskOptions o = Small();
  o.answers = 3;
  o.max_moves = 4;
  Recorder rec;
  CalibrationTask task(o);
  const CalibrationRunResult r = task.Run(clock, trainer, trainer, rec.Fn());
  EXPECT_EQ(r.stop, CalibrationStop::kMoveCap);
  EXPECT_EQ(trainer.drawn.size(), 6u);  // 2 practice + 4 real
  EXPECT_EQ(r.progress.missed, 4u);
  // It waited out the last move's 4 s window before stopping.
  EXPECT_GE(clock.NowNanos() - trainer.shown_ns.back(), 4 * kSecond);
  EXPECT_EQ(rec.sent.size(), 6u);
}

TEST(CalibrationTaskTest, DefaultMoveCapIsThreeTimesAnswers) {
  CalibrationTaskOptions o = Small();
  o.answers = 7;
  EXPECT_EQ(CalibrationTask(o).max_moves(), 21u);
}

TEST(CalibrationTaskTest, QuitStopsWithWhatThereIs) {
  FakeMonotonic clock(5 * kSecond);
  FakeTrainer trainer(&clock, [](const CalibrationMoveView& m) {
    return std::vector<Plan>{{0.3, m.approve}};
  });
  trainer.quit_after_answers = 4;
  Recorder rec;
  CalibrationTask task(Small());
  const CalibrationRunResult r = task.Run(clock, trainer, trainer, rec.Fn());
  EXPECT_EQ(r.stop, CalibrationStop::kQuit);
  EXPECT_EQ(r.progress.answers, 4u);
  EXPECT_EQ(r.progress.valid, 2u);  // two practice answers, two valid
}

TEST(CalibrationTaskTest, SendFailureStopsTheRun) {
  FakeMonotonic clock(5 * kSecond);
  FakeTrainer trainer(&clock, [](const CalibrationMoveView& m) {
    return std::vector<Plan>{{0.3, m.approve}};
  });
  int calls = 0;
  CalibrationTask task(Small());
  const CalibrationRunResult r =
      task.Run(clock, trainer, trainer, [&](tickmark::v1::CalibrationMessage) {
        return ++calls < 3 ? absl::OkStatus() : absl::FailedPreconditionError("client stopped");
      });
  EXPECT_EQ(r.stop, CalibrationStop::kSendFailed);
  EXPECT_EQ(r.send_error.code(), absl::StatusCode::kFailedPrecondition);
  EXPECT_EQ(calls, 3);
}

TEST(CalibrationTaskTest, PracticeProgressAndMissedNotCountedWhileOpen) {
  CalibrationTaskOptions o = Small();
  o.practice = 1;
  CalibrationTask task(o);
  task.Start(0);
  EXPECT_TRUE(task.Progress(0).in_practice);
  task.MoveShown(kSecond);  // practice
  CalibrationProgress p = task.Progress(kSecond);
  EXPECT_TRUE(p.in_practice);
  EXPECT_EQ(p.practice_shown, 1u);
  task.MoveShown(3 * kSecond);                       // real move 1, unanswered
  EXPECT_EQ(task.Progress(4 * kSecond).missed, 0u);  // still open
  EXPECT_EQ(task.Progress(7 * kSecond).missed, 1u);  // window (4 s) passed
  task.Answer({7 * kSecond + 1, true, "key:f"});
  EXPECT_EQ(task.Progress(7 * kSecond + 1).last, "late or stray");
}

TEST(CalibrationTaskTest, OptionsAreChecked) {
  EXPECT_TRUE(ValidateCalibrationTaskOptions(Small()).ok());
  auto bad = [](auto edit) {
    CalibrationTaskOptions o = Small();
    edit(o);
    return ValidateCalibrationTaskOptions(o).code() == absl::StatusCode::kInvalidArgument;
  };
  EXPECT_TRUE(bad([](CalibrationTaskOptions& o) { o.run = ""; }));
  EXPECT_TRUE(bad([](CalibrationTaskOptions& o) { o.run = "has space"; }));
  EXPECT_TRUE(bad([](CalibrationTaskOptions& o) { o.answers = 2; }));
  EXPECT_TRUE(bad([](CalibrationTaskOptions& o) { o.min_interval_s = 0.1; }));
  EXPECT_TRUE(bad([](CalibrationTaskOptions& o) {
    o.min_interval_s = 4;
    o.max_interval_s = 3;
  }));
  EXPECT_TRUE(bad([](CalibrationTaskOptions& o) { o.max_moves = 3; }));
  EXPECT_TRUE(bad([](CalibrationTaskOptions& o) { o.step_cells = 11; }));
  EXPECT_EQ(MakeCalibrationRunId(0xabcdef), "cal-000000abcdef");
  EXPECT_TRUE(ValidateCalibrationTaskOptions([] {
                CalibrationTaskOptions o = Small();
                o.run = MakeCalibrationRunId(~0ULL);
                return o;
              }())
                  .ok());
}

}  // namespace
}  // namespace tickmark::client

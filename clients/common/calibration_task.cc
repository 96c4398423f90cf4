#include "clients/common/calibration_task.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <utility>

#include "absl/strings/str_cat.h"

namespace tickmark::client {
namespace {

bool IsRunChar(char c) {
  return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') || c == '-' ||
         c == '_' || c == '.';
}

std::string Seconds(double s) {
  char buf[32];
  std::snprintf(buf, sizeof buf, "%.2f s", s);
  return buf;
}

// SplitMix64 ("Fast splittable pseudorandom number generators", OOPSLA
// 2014; constants as published, written from memory): a fixed algorithm, so a
// seed gives the same schedule on every platform (the standard
// distributions do not promise that). The tests check bounds and
// determinism, not these constants.
uint64_t SplitMix64(uint64_t* state) {
  uint64_t z = (*state += 0x9e3779b97f4a7c15ULL);
  z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
  z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
  return z ^ (z >> 31);
}

}  // namespace

absl::Status ValidateCalibrationTaskOptions(const CalibrationTaskOptions& o) {
  if (o.run.empty() || o.run.size() > 64 || !std::all_of(o.run.begin(), o.run.end(), IsRunChar)) {
    return absl::InvalidArgumentError(
        absl::StrCat("run id \"", o.run, "\": use 1 to 64 letters, digits, '-', '_' or '.'"));
  }
  if (o.answers < 3 || o.answers > 1000) {
    return absl::InvalidArgumentError(absl::StrCat(
        "--answers ", o.answers, ": must be in [3, 1000] (3 is the fewest a fit takes)"));
  }
  if (o.practice > 100) {
    return absl::InvalidArgumentError(absl::StrCat("--practice ", o.practice, ": at most 100"));
  }
  if (!(o.min_interval_s >= 0.2) || !(o.max_interval_s <= 60) ||
      !(o.min_interval_s <= o.max_interval_s)) {
    return absl::InvalidArgumentError(absl::StrCat("move interval [", o.min_interval_s, ", ",
                                                   o.max_interval_s,
                                                   "] s: need 0.2 <= min <= max <= 60"));
  }
  if (o.max_moves != 0 && o.max_moves < o.answers) {
    return absl::InvalidArgumentError(absl::StrCat(
        "--max-moves ", o.max_moves, ": must be at least --answers (", o.answers, ")"));
  }
  if (o.track_cells < 3 || o.track_cells > 200 || o.step_cells < 1 ||
      o.step_cells * 2 >= o.track_cells) {
    return absl::InvalidArgumentError(
        absl::StrCat("track of ", o.track_cells, " cells with steps of ", o.step_cells,
                     ": need 3..200 cells and a step under half the track"));
  }
  if (!(o.window_s > 0)) return absl::InvalidArgumentError("matching window must be positive");
  return absl::OkStatus();
}

std::string MakeCalibrationRunId(uint64_t entropy) {
  char buf[32];
  std::snprintf(buf, sizeof buf, "cal-%012llx",
                static_cast<unsigned long long>(entropy & 0xffffffffffffULL));
  return buf;
}

const char* CalibrationStopName(CalibrationStop stop) {
  switch (stop) {
    case CalibrationStop::kEnoughAnswers:
      return "enough valid answers";
    case CalibrationStop::kMoveCap:
      return "move limit reached";
    case CalibrationStop::kQuit:
      return "stopped by the trainer";
    case CalibrationStop::kSendFailed:
      return "sending failed";
  }
  return "unknown";
}

CalibrationTask::CalibrationTask(CalibrationTaskOptions options)
    : options_(std::move(options)),
      max_moves_(options_.max_moves != 0 ? options_.max_moves : 3 * options_.answers),
      rng_state_(options_.seed),
      cell_(options_.track_cells / 2) {}

std::string CalibrationTask::RuleText() const {
  return options_.approve_right ? "approve moves to the RIGHT, disapprove moves to the LEFT"
                                : "approve moves to the LEFT, disapprove moves to the RIGHT";
}

double CalibrationTask::Uniform() {
  return static_cast<double>(SplitMix64(&rng_state_) >> 11) * 0x1.0p-53;
}

void CalibrationTask::DrawNext(int64_t after_ns) {
  const double interval =
      options_.min_interval_s + (options_.max_interval_s - options_.min_interval_s) * Uniform();
  next_due_ns_ = after_ns + static_cast<int64_t>(std::llround(interval * 1e9));
  const uint32_t room_left = cell_;
  const uint32_t room_right = options_.track_cells - 1 - cell_;
  const bool right = Uniform() * (room_left + room_right) < room_right;
  CalibrationMoveView m;
  m.number = shown_ + 1;
  m.practice = shown_ < options_.practice;
  m.index = m.practice ? shown_ + 1 : shown_ - options_.practice + 1;
  m.right = right;
  m.approve = right == options_.approve_right;
  m.from_cell = cell_;
  m.to_cell = right ? cell_ + std::min(options_.step_cells, room_right)
                    : cell_ - std::min(options_.step_cells, room_left);
  next_ = m;
}

void CalibrationTask::Start(int64_t now_ns) { DrawNext(now_ns); }

tickmark::v1::CalibrationMessage CalibrationTask::MoveShown(int64_t shown_ns) {
  const CalibrationMoveView m = next_;
  tickmark::v1::CalibrationMessage msg;
  msg.set_run(options_.run);
  auto* move = msg.mutable_move();
  move->set_move(m.number);
  move->set_shown_source_ns(shown_ns);
  move->set_approve(m.approve);
  move->set_practice(m.practice);
  move->set_detail(m.detail());
  moves_.push_back({ClientTime::FromNanos(shown_ns), m.approve, m.practice});
  ++shown_;
  if (!m.practice) ++real_shown_;
  cell_ = m.to_cell;
  DrawNext(shown_ns);
  return msg;
}

tickmark::v1::CalibrationMessage CalibrationTask::Answer(const CalibrationInputAnswer& a) {
  tickmark::v1::CalibrationMessage msg;
  msg.set_run(options_.run);
  auto* answer = msg.mutable_answer();
  answer->set_event_source_ns(a.at_ns);
  answer->set_approve(a.approve);
  answer->set_input(a.input);
  answers_.push_back({ClientTime::FromNanos(a.at_ns), a.approve});
  return msg;
}

tickmark::v1::CalibrationMessage CalibrationTask::Finish() const {
  tickmark::v1::CalibrationMessage msg;
  msg.set_run(options_.run);
  auto* finish = msg.mutable_finish();
  finish->set_min_answers(options_.answers);
  finish->set_display_note(options_.display_note);
  return msg;
}

CalibrationMatchResult CalibrationTask::Match() const {
  CalibrationMatchOptions mo;
  mo.window = Duration::FromSeconds(options_.window_s);
  return MatchCalibration(moves_, answers_, mo);
}

CalibrationProgress CalibrationTask::Progress(int64_t now_ns) const {
  const CalibrationMatchResult r = Match();
  CalibrationProgress p;
  p.wanted = options_.answers;
  p.valid = static_cast<uint32_t>(r.valid);
  p.wrong_sign = static_cast<uint32_t>(r.wrong_sign);
  p.double_answers = static_cast<uint32_t>(r.double_answers);
  p.stray = static_cast<uint32_t>(r.stray);
  p.practice_answers = static_cast<uint32_t>(r.practice_answers);
  p.missed = static_cast<uint32_t>(r.missed);
  // The latest move, unanswered and inside its window, is not missed yet.
  if (!moves_.empty() && !moves_.back().practice && !r.move_answered.back() &&
      now_ns - moves_.back().shown.nanos() < Duration::FromSeconds(options_.window_s).nanos() &&
      p.missed > 0) {
    --p.missed;
  }
  p.moves = real_shown_;
  p.max_moves = max_moves_;
  p.practice_total = options_.practice;
  p.practice_shown = std::min(shown_, options_.practice);
  p.answers = static_cast<uint32_t>(answers_.size());
  p.in_practice = real_shown_ == 0;
  // The latest answer by time (the matcher lists them in time order).
  if (!r.answers.empty()) {
    const MatchedAnswer& last = r.answers.back();
    switch (last.outcome) {
      case AnswerOutcome::kValid:
        p.last = "valid " + Seconds(last.delay.seconds());
        break;
      case AnswerOutcome::kWrongSign:
        p.last = "WRONG SIGN";
        break;
      case AnswerOutcome::kDouble:
        p.last = "double (move already answered)";
        break;
      case AnswerOutcome::kStray:
        p.last = "late or stray";
        break;
      case AnswerOutcome::kPractice: {
        const bool right_sign =
            last.move.has_value() && moves_[*last.move].approve == answers_[last.answer].approve;
        p.last = right_sign ? "practice ok " + Seconds(last.delay.seconds())
                            : std::string("practice: wrong sign");
        break;
      }
    }
  }
  return p;
}

std::optional<CalibrationStop> CalibrationTask::Done(int64_t now_ns) const {
  const CalibrationMatchResult r = Match();
  if (r.valid >= options_.answers) return CalibrationStop::kEnoughAnswers;
  if (!MoreMoves()) {
    const bool closed =
        moves_.empty() || r.move_answered.back() ||
        now_ns - moves_.back().shown.nanos() >= Duration::FromSeconds(options_.window_s).nanos();
    if (closed) return CalibrationStop::kMoveCap;
  }
  return std::nullopt;
}

CalibrationRunResult CalibrationTask::Run(const MonotonicSource& clock, CalibrationDisplay& display,
                                          CalibrationInputSource& input, const Send& send) {
  CalibrationRunResult result;
  Start(clock.NowNanos());
  display.ShowProgress(Progress(clock.NowNanos()));
  const int64_t slice_ns = 500'000'000;  // refresh the counts at least this often
  const int64_t window_ns = Duration::FromSeconds(options_.window_s).nanos();
  while (true) {
    const int64_t now = clock.NowNanos();
    if (std::optional<CalibrationStop> stop = Done(now)) {
      result.stop = *stop;
      break;
    }
    const int64_t until = MoreMoves()
                              ? next_due_ns_
                              : (moves_.empty() ? now : moves_.back().shown.nanos() + window_ns);
    if (now < until) {
      CalibrationInput in = input.Wait(std::min(until, now + slice_ns));
      bool failed = false;
      for (const CalibrationInputAnswer& a : in.answers) {
        if (absl::Status s = send(Answer(a)); !s.ok()) {
          result.send_error = s;
          failed = true;
          break;
        }
      }
      display.ShowProgress(Progress(clock.NowNanos()));
      if (failed) {
        result.stop = CalibrationStop::kSendFailed;
        break;
      }
      if (in.quit) {
        result.stop = CalibrationStop::kQuit;
        break;
      }
      continue;
    }
    if (MoreMoves()) {
      const int64_t shown = display.DrawMove(next_);
      absl::Status s = send(MoveShown(shown));
      display.ShowProgress(Progress(clock.NowNanos()));
      if (!s.ok()) {
        result.send_error = s;
        result.stop = CalibrationStop::kSendFailed;
        break;
      }
    }
  }
  result.progress = Progress(clock.NowNanos());
  return result;
}

}  // namespace tickmark::client

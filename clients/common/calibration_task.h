// CalibrationTask: the calibration task a trainer source runs to measure the
// trainer's evaluative delay (docs/calibration.md), apart from any terminal
// or device so that every source (tickmark-keys, tickmark-serial) runs the
// same task and tests drive it with a fake display, input and clock.
//
// The task. A small mover on a track (21 cells by default) makes moves at
// random intervals (uniform in [0.8 s, 3 s] by default, from the previous
// move's presentation). Each move jumps `step_cells` cells left or right.
// A rule is shown before the start, by default "approve moves to the RIGHT,
// disapprove moves to the LEFT", and the trainer judges every move with
// their usual approve and disapprove inputs. The time from a move's
// presentation to its answer is an evaluative delay: seeing the move,
// judging it against the rule and acting on the judgement; not a bare
// reaction time (a reaction-time task needs no judgement).
//
// Direction. A move goes right with probability room_right / (room_left +
// room_right), the free cells on each side of the mover: one half at the
// centre, never off the track. The walk is symmetric about the centre, so
// about half the moves go right and half the answers should be approvals;
// a trainer cannot predict a move except at the very ends of the track,
// which the walk seldom reaches (common practice, no source).
//
// Blocks. First `practice` moves (default 5), shown as practice: they are
// sent (so that a late practice answer is not taken for a judgement of the
// first real move) but the server fits none of their answers. Then real
// moves until `answers` valid answers (default 40) have been given, or
// `max_moves` real moves (default 3 × answers) have been shown and the last
// one has been answered or its window has passed, or the trainer quits.
//
// Timing. A move's presentation time is read from the source's clock right
// after the display's drawing call returned (for a terminal: after the write
// of the escape sequences returned). The light reaches the eye later by the
// terminal emulator's and monitor's latency — typically one to a few frames,
// about 10 to 50 ms (from memory) — which is not measured and so is part of
// every delay; kDisplayLatencyNote says so, and is sent as the finish's
// display_note. Answers carry the source's own event time (the read time
// for terminal keys, the kernel's timestamp for input devices).
//
// Matching is done by the server (server/core/calibration_match.h). For the
// live counts on the trainer's screen the task applies the same rule
// (MatchCalibration, with the same 4 s window) to what it has sent so far;
// the server's result is the one that counts.
//
// Messages. Every move and answer becomes a CalibrationMessage (stream.proto)
// handed to the caller's send function as it happens; the caller sends it
// on its StreamClient (SendRequest), which numbers, resends after a
// reconnect and acknowledges it like feedback. Finish() gives the closing
// CalibrationFinish; the server answers it with the fitted Calibration.
//
// Not thread-safe: one thread runs a task.
#ifndef TICKMARK_CLIENTS_COMMON_CALIBRATION_TASK_H_
#define TICKMARK_CLIENTS_COMMON_CALIBRATION_TASK_H_

#include <cstdint>
#include <functional>
#include <optional>
#include <string>
#include <vector>

#include "absl/status/status.h"
#include "server/core/calibration_match.h"
#include "server/core/time.h"
#include "tickmark/v1/stream.pb.h"

namespace tickmark::client {

// What a terminal display leaves unmeasured; the finish's display_note.
inline constexpr char kDisplayLatencyNote[] =
    "move times were read right after the terminal write returned; the "
    "terminal emulator and monitor refresh add an unmeasured display latency, "
    "typically one to a few frames (about 10-50 ms), included in every delay";

struct CalibrationTaskOptions {
  // The run id (letters, digits, '-', '_', '.'; at most 64 characters).
  std::string run;
  uint32_t answers = 40;  // valid answers wanted
  uint32_t practice = 5;  // practice moves before the measured ones
  double min_interval_s = 0.8;
  double max_interval_s = 3.0;
  // Real moves at most; 0: 3 × answers.
  uint32_t max_moves = 0;
  uint64_t seed = 1;
  // The rule: approve moves to the right (else: to the left).
  bool approve_right = true;
  uint32_t track_cells = 21;
  uint32_t step_cells = 2;
  // The matching window of the live counts (the server's default).
  double window_s = 4.0;
  std::string display_note = kDisplayLatencyNote;
};

// INVALID_ARGUMENT naming the bad option.
absl::Status ValidateCalibrationTaskOptions(const CalibrationTaskOptions& options);
// A fresh run id: "cal-" and 12 hex digits from `entropy`.
std::string MakeCalibrationRunId(uint64_t entropy);

// One move, as the display draws it.
struct CalibrationMoveView {
  uint32_t number = 0;  // from 1, over practice and real moves
  bool practice = false;
  uint32_t index = 0;      // from 1 within its block (practice or real)
  bool right = false;      // the direction
  bool approve = false;    // the rule's verdict
  uint32_t from_cell = 0;  // the mover's cell before and after
  uint32_t to_cell = 0;
  const char* detail() const { return right ? "right" : "left"; }
};

// The live counts (the same rule as the server's matching).
struct CalibrationProgress {
  uint32_t wanted = 0;
  uint32_t valid = 0;
  uint32_t wrong_sign = 0;
  uint32_t missed = 0;  // real moves passed without an answer
  uint32_t double_answers = 0;
  uint32_t stray = 0;  // late (after the window) or before any move
  uint32_t practice_answers = 0;
  uint32_t moves = 0;  // real moves shown
  uint32_t max_moves = 0;
  uint32_t practice_shown = 0;
  uint32_t practice_total = 0;
  uint32_t answers = 0;     // answers given (all kinds)
  bool in_practice = true;  // no real move shown yet
  // About the latest answer: "valid 0.52 s", "WRONG SIGN", "double",
  // "late or stray", "practice ok 0.61 s", "practice: wrong sign"; empty
  // before the first answer.
  std::string last;
};

// One answer from the trainer's input.
struct CalibrationInputAnswer {
  int64_t at_ns = 0;  // event time on the source's clock
  bool approve = false;
  std::string input;  // "key:f", "button:BTN_LEFT"
};

struct CalibrationInput {
  std::vector<CalibrationInputAnswer> answers;
  bool quit = false;  // the trainer asked to stop (q, Ctrl-C)
};

class CalibrationDisplay {
 public:
  virtual ~CalibrationDisplay() = default;
  // Draws the move; returns the source's clock read right after the drawing
  // call returned.
  virtual int64_t DrawMove(const CalibrationMoveView& move) = 0;
  // Shows the live counts (after every move, answer and wait).
  virtual void ShowProgress(const CalibrationProgress& progress) = 0;
};

class CalibrationInputSource {
 public:
  virtual ~CalibrationInputSource() = default;
  // Waits until input arrives or the source's clock reaches until_ns, and
  // returns what arrived (maybe nothing).
  virtual CalibrationInput Wait(int64_t until_ns) = 0;
};

enum class CalibrationStop {
  kEnoughAnswers,  // `answers` valid answers
  kMoveCap,        // max_moves real moves shown, the last one closed
  kQuit,           // the trainer quit
  kSendFailed,     // the send function failed
};
const char* CalibrationStopName(CalibrationStop stop);

struct CalibrationRunResult {
  CalibrationStop stop = CalibrationStop::kQuit;
  absl::Status send_error;  // for kSendFailed
  CalibrationProgress progress;
};

class CalibrationTask {
 public:
  using Send = std::function<absl::Status(tickmark::v1::CalibrationMessage)>;

  // `options` must pass ValidateCalibrationTaskOptions.
  explicit CalibrationTask(CalibrationTaskOptions options);

  const CalibrationTaskOptions& options() const { return options_; }
  uint32_t max_moves() const { return max_moves_; }
  // The rule as shown: "approve moves to the RIGHT, disapprove moves to the LEFT".
  std::string RuleText() const;

  // The pieces Run() is made of, for other drivers and tests.
  // Starts the schedule: the first move is due one interval after now_ns.
  void Start(int64_t now_ns);
  // The move to draw next, and when (valid after Start, while MoreMoves()).
  const CalibrationMoveView& next_move() const { return next_; }
  int64_t next_due_ns() const { return next_due_ns_; }
  bool MoreMoves() const { return real_shown_ < max_moves_; }
  // The next move was drawn at shown_ns: its message; draws the one after.
  tickmark::v1::CalibrationMessage MoveShown(int64_t shown_ns);
  // An answer arrived: its message.
  tickmark::v1::CalibrationMessage Answer(const CalibrationInputAnswer& answer);
  // The closing message of the run.
  tickmark::v1::CalibrationMessage Finish() const;
  CalibrationProgress Progress(int64_t now_ns) const;
  // Why the run is over at now_ns, if it is (quitting aside).
  std::optional<CalibrationStop> Done(int64_t now_ns) const;

  // Runs the task to its end: Start, then moves when due and answers as they
  // come, each message handed to `send` at once. Does not send the finish.
  CalibrationRunResult Run(const MonotonicSource& clock, CalibrationDisplay& display,
                           CalibrationInputSource& input, const Send& send);

 private:
  double Uniform();  // [0, 1), from the seeded generator
  void DrawNext(int64_t after_ns);
  CalibrationMatchResult Match() const;

  CalibrationTaskOptions options_;
  uint32_t max_moves_ = 0;
  uint64_t rng_state_ = 0;
  uint32_t cell_ = 0;        // the mover's cell
  uint32_t shown_ = 0;       // moves shown (both blocks)
  uint32_t real_shown_ = 0;  // real moves shown
  CalibrationMoveView next_;
  int64_t next_due_ns_ = 0;
  std::vector<CalibrationMove> moves_;      // shown, in order
  std::vector<CalibrationAnswer> answers_;  // given, in order
};

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_CALIBRATION_TASK_H_

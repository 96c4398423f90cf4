// The matching rule of the calibration task: which move of
// the on-screen mover each of a trainer's answers judged, and so the
// trainer's evaluative delays.
//
// A move is presented at a time on the source's clock and the shown rule
// either approves or disapproves it. An answer (time on the same clock, and
// its sign) is matched to the latest move presented strictly before it,
// provided that move is still open: a move is open from its presentation
// until `window` (default 4 s) later, or until it or any later move has been
// answered (the trainer has moved on). So an answer whose latest move was
// already answered is a double answer, and one with no move presented in the
// last `window` is a stray answer; neither is matched. A matched answer of
// the wrong sign closes the move but gives no delay. Moves of the practice
// block are matched like the others (so a practice answer cannot be taken
// for a judgement of the first real move) but none of their answers or
// misses count. Only matched, right-sign answers to non-practice moves
// yield delays.
//
// Pure function of its input, which may be in any order; thread-safe.
#ifndef TICKMARK_SERVER_CORE_CALIBRATION_MATCH_H_
#define TICKMARK_SERVER_CORE_CALIBRATION_MATCH_H_

#include <cstddef>
#include <optional>
#include <span>
#include <vector>

#include "server/core/time.h"

namespace tickmark {

struct CalibrationMove {
  ClientTime shown;       // presentation time, taken right after drawing
  bool approve = false;   // the rule's verdict: the right answer's sign
  bool practice = false;  // part of the practice block
};

struct CalibrationAnswer {
  ClientTime at;         // the source's event time of the answer
  bool approve = false;  // the answer's sign
};

enum class AnswerOutcome {
  kValid,      // matched, right sign, real move: a delay
  kWrongSign,  // matched, wrong sign
  kPractice,   // matched to a practice move
  kDouble,     // its latest move was already answered
  kStray,      // no move presented in the window before it
};
const char* AnswerOutcomeName(AnswerOutcome outcome);  // "valid", ...

struct CalibrationMatchOptions {
  Duration window = Duration::Seconds(4);  // longest delay matched
};

struct MatchedAnswer {
  size_t answer = 0;  // index into the answers given
  AnswerOutcome outcome = AnswerOutcome::kStray;
  std::optional<size_t> move;  // index into the moves given, when matched
  Duration delay;              // at - shown, when matched
};

struct CalibrationMatchResult {
  std::vector<MatchedAnswer> answers;  // one per answer, in time order
  std::vector<bool> move_answered;     // per move given, in input order
  std::vector<double> delays_seconds;  // the valid delays, in time order
  size_t valid = 0;
  size_t wrong_sign = 0;
  size_t double_answers = 0;
  size_t stray = 0;
  size_t practice_answers = 0;
  size_t missed = 0;  // non-practice moves never answered
  size_t moves = 0;   // non-practice moves
};

CalibrationMatchResult MatchCalibration(std::span<const CalibrationMove> moves,
                                        std::span<const CalibrationAnswer> answers,
                                        const CalibrationMatchOptions& options = {});

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_CALIBRATION_MATCH_H_

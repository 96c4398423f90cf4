#include "server/core/calibration_match.h"

#include <algorithm>
#include <numeric>

namespace tickmark {
namespace {

// a - b when it fits in int64 nanoseconds; times from a source are not
// trusted to be sane.
std::optional<Duration> Difference(ClientTime a, ClientTime b) {
  int64_t out = 0;
  if (__builtin_sub_overflow(a.nanos(), b.nanos(), &out)) return std::nullopt;
  return Duration::Nanos(out);
}

template <typename T, typename Key>
std::vector<size_t> OrderBy(std::span<const T> items, Key key) {
  std::vector<size_t> order(items.size());
  std::iota(order.begin(), order.end(), size_t{0});
  std::stable_sort(order.begin(), order.end(),
                   [&](size_t a, size_t b) { return key(items[a]) < key(items[b]); });
  return order;
}

}  // namespace

const char* AnswerOutcomeName(AnswerOutcome outcome) {
  switch (outcome) {
    case AnswerOutcome::kValid:
      return "valid";
    case AnswerOutcome::kWrongSign:
      return "wrong-sign";
    case AnswerOutcome::kPractice:
      return "practice";
    case AnswerOutcome::kDouble:
      return "double";
    case AnswerOutcome::kStray:
      return "stray";
  }
  return "";
}

CalibrationMatchResult MatchCalibration(std::span<const CalibrationMove> moves,
                                        std::span<const CalibrationAnswer> answers,
                                        const CalibrationMatchOptions& options) {
  CalibrationMatchResult result;
  result.move_answered.assign(moves.size(), false);
  const std::vector<size_t> move_order =
      OrderBy(moves, [](const CalibrationMove& m) { return m.shown; });
  const std::vector<size_t> answer_order =
      OrderBy(answers, [](const CalibrationAnswer& a) { return a.at; });

  // Moves before `next_move` (in time order) have been presented before the
  // current answer; every move before `closed_below` is closed.
  size_t next_move = 0;
  size_t closed_below = 0;
  for (size_t ai : answer_order) {
    const CalibrationAnswer& a = answers[ai];
    while (next_move < move_order.size() && moves[move_order[next_move]].shown < a.at) {
      ++next_move;
    }
    MatchedAnswer m;
    m.answer = ai;
    if (next_move == 0) {
      m.outcome = AnswerOutcome::kStray;
    } else {
      const size_t latest = next_move - 1;
      const size_t mi = move_order[latest];
      const std::optional<Duration> delay = Difference(a.at, moves[mi].shown);
      if (!delay || *delay > options.window) {
        m.outcome = AnswerOutcome::kStray;
      } else if (latest < closed_below) {
        m.outcome = AnswerOutcome::kDouble;
      } else {
        closed_below = latest + 1;
        result.move_answered[mi] = true;
        m.move = mi;
        m.delay = *delay;
        if (moves[mi].practice) {
          m.outcome = AnswerOutcome::kPractice;
        } else if (a.approve != moves[mi].approve) {
          m.outcome = AnswerOutcome::kWrongSign;
        } else {
          m.outcome = AnswerOutcome::kValid;
          result.delays_seconds.push_back(delay->seconds());
        }
      }
    }
    switch (m.outcome) {
      case AnswerOutcome::kValid:
        ++result.valid;
        break;
      case AnswerOutcome::kWrongSign:
        ++result.wrong_sign;
        break;
      case AnswerOutcome::kPractice:
        ++result.practice_answers;
        break;
      case AnswerOutcome::kDouble:
        ++result.double_answers;
        break;
      case AnswerOutcome::kStray:
        ++result.stray;
        break;
    }
    result.answers.push_back(m);
  }
  for (size_t i = 0; i < moves.size(); ++i) {
    if (moves[i].practice) continue;
    ++result.moves;
    if (!result.move_answered[i]) ++result.missed;
  }
  return result;
}

}  // namespace tickmark

// The calibration task's matching rule on scripted sequences: each case
// lists moves and answers (times in ms on the source clock) and the outcome
// expected for every answer.
#include "server/core/calibration_match.h"

#include <gtest/gtest.h>

#include <cstdint>
#include <limits>
#include <string>
#include <vector>

namespace tickmark {
namespace {

ClientTime Ms(int64_t ms) { return ClientTime::FromNanos(ms * 1'000'000); }

struct Move {
  int64_t ms;
  char rule;
  bool practice = false;
};  // rule '+' or '-'
struct Answer {
  int64_t ms;
  char sign;
};

struct Case {
  std::string name;
  std::vector<Move> moves;
  std::vector<Answer> answers;
  std::string outcomes;        // per answer in time order: V W P D S
  std::vector<double> delays;  // valid delays, seconds
  size_t missed = 0;
};

char Code(AnswerOutcome o) {
  switch (o) {
    case AnswerOutcome::kValid:
      return 'V';
    case AnswerOutcome::kWrongSign:
      return 'W';
    case AnswerOutcome::kPractice:
      return 'P';
    case AnswerOutcome::kDouble:
      return 'D';
    case AnswerOutcome::kStray:
      return 'S';
  }
  return '?';
}

TEST(CalibrationMatchTest, ScriptedSequences) {
  const std::vector<Case> cases = {
      {"one move, answered in time", {{0, '+'}}, {{450, '+'}}, "V", {0.45}, 0},
      {"early: an answer before any move is stray",
       {{1000, '+'}},
       {{900, '+'}, {1500, '+'}},
       "SV",
       {0.5},
       0},
      {"an answer at the very presentation instant is not after it",
       {{1000, '+'}},
       {{1000, '+'}, {1300, '+'}},
       "SV",
       {0.3},
       0},
      {"late: more than 4 s after the latest move is stray", {{0, '-'}}, {{4001, '-'}}, "S", {}, 1},
      {"exactly 4 s is still matched", {{0, '-'}}, {{4000, '-'}}, "V", {4.0}, 0},
      {"wrong sign closes the move and gives no delay",
       {{0, '+'}, {2000, '-'}},
       {{500, '-'}, {2600, '-'}},
       "WV",
       {0.6},
       0},
      {"double: a second answer to the same move",
       {{0, '+'}, {3000, '+'}},
       {{400, '+'}, {700, '+'}, {3500, '+'}},
       "VDV",
       {0.4, 0.5},
       0},
      {"a corrected wrong answer is a double, not a delay",
       {{0, '+'}},
       {{400, '-'}, {600, '+'}},
       "WD",
       {},
       0},
      {"missed: a move with no answer",
       {{0, '+'}, {1500, '-'}, {3000, '+'}},
       {{500, '+'}, {3400, '+'}},
       "VV",
       {0.5, 0.4},
       1},
      {"a late answer goes to the latest move, and the earlier one is missed",
       {{0, '+'}, {1000, '+'}},
       {{1300, '+'}},
       "V",
       {0.3},
       1},
      {"answering a later move closes earlier ones",
       {{0, '+'}, {1000, '-'}},
       {{1200, '-'}, {1250, '+'}},
       "VD",
       {0.2},
       1},
      {"practice moves give no delays and no misses",
       {{0, '+', true}, {1000, '-', true}, {3000, '+'}},
       {{400, '+'}, {3500, '+'}},
       "PV",
       {0.5},
       0},
      {"a practice answer cannot be taken for the first real move",
       {{0, '+', true}, {900, '+'}},
       {{1000, '+'}, {1400, '+'}},
       "VD",
       {0.1},
       0},
      {"input in any order",
       {{3000, '-'}, {0, '+'}},
       {{3300, '-'}, {250, '+'}},
       "VV",
       {0.25, 0.3},
       0},
  };
  for (const Case& c : cases) {
    SCOPED_TRACE(c.name);
    std::vector<CalibrationMove> moves;
    for (const Move& m : c.moves) moves.push_back({Ms(m.ms), m.rule == '+', m.practice});
    std::vector<CalibrationAnswer> answers;
    for (const Answer& a : c.answers) answers.push_back({Ms(a.ms), a.sign == '+'});
    const CalibrationMatchResult r = MatchCalibration(moves, answers);
    std::string got;
    for (const MatchedAnswer& m : r.answers) got += Code(m.outcome);
    EXPECT_EQ(got, c.outcomes);
    ASSERT_EQ(r.delays_seconds.size(), c.delays.size());
    for (size_t i = 0; i < c.delays.size(); ++i) {
      EXPECT_NEAR(r.delays_seconds[i], c.delays[i], 1e-12);
    }
    EXPECT_EQ(r.missed, c.missed);
    EXPECT_EQ(r.valid, r.delays_seconds.size());
    EXPECT_EQ(r.valid + r.wrong_sign + r.practice_answers + r.double_answers + r.stray,
              answers.size());
  }
}

TEST(CalibrationMatchTest, ReportsWhichMoveEachAnswerJudged) {
  const std::vector<CalibrationMove> moves = {{Ms(2000), false, false}, {Ms(0), true, false}};
  const std::vector<CalibrationAnswer> answers = {{Ms(2450), false}, {Ms(300), true}};
  const CalibrationMatchResult r = MatchCalibration(moves, answers);
  ASSERT_EQ(r.answers.size(), 2u);
  EXPECT_EQ(r.answers[0].answer, 1u);  // time order
  EXPECT_EQ(r.answers[0].move, 1u);    // input index
  EXPECT_EQ(r.answers[0].delay, Duration::Millis(300));
  EXPECT_EQ(r.answers[1].answer, 0u);
  EXPECT_EQ(r.answers[1].move, 0u);
  EXPECT_EQ(r.answers[1].delay, Duration::Millis(450));
  EXPECT_EQ(r.move_answered, (std::vector<bool>{true, true}));
  EXPECT_EQ(r.moves, 2u);
  EXPECT_EQ(AnswerOutcomeName(AnswerOutcome::kDouble), std::string("double"));
}

TEST(CalibrationMatchTest, WindowIsAnOption) {
  const std::vector<CalibrationMove> moves = {{Ms(0), true, false}};
  const std::vector<CalibrationAnswer> answers = {{Ms(2500), true}};
  CalibrationMatchOptions options;
  options.window = Duration::Seconds(2);
  EXPECT_EQ(MatchCalibration(moves, answers, options).stray, 1u);
  EXPECT_EQ(MatchCalibration(moves, answers).valid, 1u);
}

TEST(CalibrationMatchTest, AbsurdSourceTimesDoNotOverflow) {
  const std::vector<CalibrationMove> moves = {
      {ClientTime::FromNanos(std::numeric_limits<int64_t>::min()), true, false}};
  const std::vector<CalibrationAnswer> answers = {
      {ClientTime::FromNanos(std::numeric_limits<int64_t>::max()), true}};
  const CalibrationMatchResult r = MatchCalibration(moves, answers);
  EXPECT_EQ(r.stray, 1u);
  EXPECT_EQ(r.missed, 1u);
}

TEST(CalibrationMatchTest, EmptyInputs) {
  const CalibrationMatchResult r = MatchCalibration({}, {});
  EXPECT_TRUE(r.answers.empty());
  EXPECT_EQ(r.moves, 0u);
}

}  // namespace
}  // namespace tickmark

// The --stdin-lines input of tickmark-keys: one feedback per line.
//
//   +1            approve
//   -1 key:j      disapprove, with an input label for the record
//   0.5           graded; any finite value in [-1000, 1000]
//   # comment     ignored, as are blank lines
//
// Parsing only, no I/O: LineSplitter is fed the bytes of each read() and
// hands back complete lines, so every line can be stamped with the time its
// read() returned. Thread-compatible.
#ifndef TICKMARK_CLIENTS_KEYS_LINE_INPUT_H_
#define TICKMARK_CLIENTS_KEYS_LINE_INPUT_H_

#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/statusor.h"

namespace tickmark::keys {

class LineSplitter {
 public:
  // Complete lines in `bytes` (plus what an earlier call left), without
  // their '\n' (and '\r').
  std::vector<std::string> Feed(std::string_view bytes);
  // At end of input: the unterminated last line, if any.
  std::optional<std::string> Finish();

 private:
  std::string partial_;
};

struct LineFeedback {
  double value = 0;
  std::string input;  // "line" unless the line names one
};

// nullopt for blank and comment lines; INVALID_ARGUMENT for anything else
// that is not "VALUE [INPUT]".
absl::StatusOr<std::optional<LineFeedback>> ParseFeedbackLine(std::string_view line);

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_LINE_INPUT_H_

#include "clients/keys/line_input.h"

#include <charconv>
#include <cmath>

#include "clients/keys/key_map.h"

namespace tickmark::keys {
namespace {

std::string_view Trim(std::string_view s) {
  const auto space = [](char c) { return c == ' ' || c == '\t' || c == '\r'; };
  while (!s.empty() && space(s.front())) s.remove_prefix(1);
  while (!s.empty() && space(s.back())) s.remove_suffix(1);
  return s;
}

}  // namespace

std::vector<std::string> LineSplitter::Feed(std::string_view bytes) {
  std::vector<std::string> lines;
  for (char c : bytes) {
    if (c == '\n') {
      if (!partial_.empty() && partial_.back() == '\r') partial_.pop_back();
      lines.push_back(std::move(partial_));
      partial_.clear();
    } else {
      partial_ += c;
    }
  }
  return lines;
}

std::optional<std::string> LineSplitter::Finish() {
  if (partial_.empty()) return std::nullopt;
  std::string last = std::move(partial_);
  partial_.clear();
  return last;
}

absl::StatusOr<std::optional<LineFeedback>> ParseFeedbackLine(std::string_view line) {
  line = Trim(line);
  if (line.empty() || line.front() == '#') return std::nullopt;
  const size_t gap = line.find_first_of(" \t");
  std::string_view number = line.substr(0, gap);
  std::string_view rest = gap == std::string_view::npos ? "" : Trim(line.substr(gap));
  const std::string shown(number);
  // from_chars takes no leading '+'; "+1" is the natural way to write approve.
  if (!number.empty() && number.front() == '+') number.remove_prefix(1);
  LineFeedback f;
  const auto [end, ec] = std::from_chars(number.data(), number.data() + number.size(), f.value);
  if (number.empty() || ec != std::errc() || end != number.data() + number.size() ||
      (number.front() == '-' && shown.front() == '+')) {
    return absl::InvalidArgumentError("\"" + shown + "\" is not a number");
  }
  if (!std::isfinite(f.value) || std::fabs(f.value) > kMaxFeedbackMagnitude) {
    return absl::InvalidArgumentError("value " + shown +
                                      " is not finite or outside [-1000, 1000]");
  }
  if (rest.find_first_of(" \t") != std::string_view::npos) {
    return absl::InvalidArgumentError("expected \"VALUE [INPUT]\", got more words");
  }
  f.input = rest.empty() ? "line" : std::string(rest);
  return f;
}

}  // namespace tickmark::keys

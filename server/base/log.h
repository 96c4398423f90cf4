// Levelled logging to stderr for tickmark's programs.
//
//   TM_LOG(kInfo) << "listening on " << addr;
//
// One line per message: "2026-12-02T10:00:00.123Z I tickmarkd: text". The
// level threshold is process-wide (SetLogLevel). Thread-safe: each message
// is formatted privately and written with one write(2).
#ifndef TICKMARK_SERVER_BASE_LOG_H_
#define TICKMARK_SERVER_BASE_LOG_H_

#include <optional>
#include <sstream>
#include <string>
#include <string_view>

namespace tickmark {

enum class LogLevel { kDebug = 0, kInfo = 1, kWarning = 2, kError = 3 };

void SetLogLevel(LogLevel level);
LogLevel GetLogLevel();
// "debug", "info", "warning", "error"; nullopt for anything else.
std::optional<LogLevel> ParseLogLevel(std::string_view name);
// Name shown in every line (the program name).
void SetLogTag(std::string tag);

namespace log_internal {
class Line {
 public:
  explicit Line(LogLevel level) : level_(level) {}
  ~Line();
  template <typename T>
  Line& operator<<(const T& v) {
    out_ << v;
    return *this;
  }

 private:
  LogLevel level_;          // severity of this line
  std::ostringstream out_;  // the message being built
};
}  // namespace log_internal

}  // namespace tickmark

#define TM_LOG(level)                                             \
  if (::tickmark::LogLevel::level < ::tickmark::GetLogLevel()) { \
  } else                                                          \
    ::tickmark::log_internal::Line(::tickmark::LogLevel::level)

#endif  // TICKMARK_SERVER_BASE_LOG_H_

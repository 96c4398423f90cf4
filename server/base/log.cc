#include "server/base/log.h"

#include <unistd.h>

#include <atomic>
#include <chrono>
#include <ctime>
#include <mutex>

namespace tickmark {
namespace {
std::atomic<int> g_level{static_cast<int>(LogLevel::kInfo)};
std::mutex g_tag_mu;
std::string g_tag = "tickmark";
}  // namespace

void SetLogLevel(LogLevel level) { g_level.store(static_cast<int>(level)); }
LogLevel GetLogLevel() { return static_cast<LogLevel>(g_level.load()); }

std::optional<LogLevel> ParseLogLevel(std::string_view name) {
  if (name == "debug") return LogLevel::kDebug;
  if (name == "info") return LogLevel::kInfo;
  if (name == "warning" || name == "warn") return LogLevel::kWarning;
  if (name == "error") return LogLevel::kError;
  return std::nullopt;
}

void SetLogTag(std::string tag) {
  std::lock_guard<std::mutex> lock(g_tag_mu);
  g_tag = std::move(tag);
}

namespace log_internal {
Line::~Line() {
  using std::chrono::system_clock;
  auto now = system_clock::now();
  std::time_t secs = system_clock::to_time_t(now);
  auto millis = std::chrono::duration_cast<std::chrono::milliseconds>(
                    now.time_since_epoch()).count() % 1000;
  std::tm tm{};
  gmtime_r(&secs, &tm);
  char stamp[32];
  std::strftime(stamp, sizeof stamp, "%Y-%m-%dT%H:%M:%S", &tm);
  static constexpr char kLetters[] = {'D', 'I', 'W', 'E'};
  std::string tag;
  {
    std::lock_guard<std::mutex> lock(g_tag_mu);
    tag = g_tag;
  }
  char head[96];
  std::snprintf(head, sizeof head, "%s.%03dZ %c %s: ", stamp, static_cast<int>(millis),
                kLetters[static_cast<int>(level_)], tag.c_str());
  std::string line = head + out_.str() + "\n";
  // One write so concurrent lines don't interleave.
  ssize_t ignored = ::write(STDERR_FILENO, line.data(), line.size());
  (void)ignored;
}
}  // namespace log_internal
}  // namespace tickmark

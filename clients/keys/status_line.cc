#include "clients/keys/status_line.h"

#include <time.h>

#include <cstdio>

namespace tickmark::keys {

std::string FormatSessionClock(int64_t session_ns) {
  const int64_t secs = session_ns >= 0 ? session_ns / 1'000'000'000
                                       : (session_ns - 999'999'999) / 1'000'000'000;
  const int64_t millis = (session_ns - secs * 1'000'000'000) / 1'000'000;
  const time_t t = static_cast<time_t>(secs);
  tm parts{};
  gmtime_r(&t, &parts);
  char buf[32];
  std::snprintf(buf, sizeof buf, "%02d:%02d:%02d.%03d", parts.tm_hour,
                parts.tm_min, parts.tm_sec, static_cast<int>(millis));
  return buf;
}

std::string FormatStatusLine(const client::StreamStatus& status,
                             const std::optional<LastFeedback>& last,
                             const std::string& legend, size_t width) {
  std::string line;
  char buf[160];
  switch (status.state) {
    case client::StreamState::kWaiting:
    case client::StreamState::kConnecting:
      if (status.connections == 0 && status.reconnects == 0) {
        line = "connecting";
      } else {
        std::snprintf(buf, sizeof buf, "reconnecting (%llu)",
                      static_cast<unsigned long long>(status.reconnects));
        line = buf;
      }
      break;
    case client::StreamState::kFailed:
      line = "STOPPED: " + status.last_error.ToString();
      break;
    default:
      line = client::StreamStateName(status.state);
  }
  if (!status.subject.empty() && status.state == client::StreamState::kConnected) {
    line += " as " + status.subject;
  }
  std::snprintf(buf, sizeof buf, "  sent %llu  acked %llu  pending %llu",
                static_cast<unsigned long long>(status.sent),
                static_cast<unsigned long long>(status.acked),
                static_cast<unsigned long long>(status.pending));
  line += buf;
  if (status.rejected > 0) {
    std::snprintf(buf, sizeof buf, "  REJECTED %llu",
                  static_cast<unsigned long long>(status.rejected));
    line += buf;
  }
  if (last) {
    std::snprintf(buf, sizeof buf, "  last %+g @ %s ±%.1f ms", last->value,
                  FormatSessionClock(last->event_session_ns).c_str(),
                  static_cast<double>(last->uncertainty_ns) * 1e-6);
    line += buf;
  }
  if (!legend.empty()) line += " | " + legend;
  if (width > 0) {
    // Cut by display columns: count UTF-8 lead bytes ("±" is two bytes).
    size_t cols = 0;
    for (size_t i = 0; i < line.size(); ++i) {
      if ((static_cast<unsigned char>(line[i]) & 0xC0) == 0x80) continue;
      if (++cols > width) {
        line.resize(i);
        break;
      }
    }
  }
  return line;
}

}  // namespace tickmark::keys

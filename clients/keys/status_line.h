// The one-line status tickmark-keys redraws in place:
//   connected  sent 12  acked 11  pending 1  last +1 @ 14:03:22.417 ±1.2 ms | f,+ approve ...
// Formatting only; no I/O. Thread-compatible.
#ifndef TICKMARK_CLIENTS_KEYS_STATUS_LINE_H_
#define TICKMARK_CLIENTS_KEYS_STATUS_LINE_H_

#include <cstddef>
#include <cstdint>
#include <optional>
#include <string>

#include "clients/common/stream_client.h"

namespace tickmark::keys {

// The latest acknowledged feedback, for display.
struct LastFeedback {
  double value = 0;
  int64_t event_session_ns = 0;
  int64_t uncertainty_ns = 0;
};

// "HH:MM:SS.mmm" of a session time (UTC, docs/architecture.md §4).
std::string FormatSessionClock(int64_t session_ns);

// The status line, cut to `width` columns (0: no limit) so that it never
// wraps — a wrapped line cannot be redrawn with a carriage return.
std::string FormatStatusLine(const client::StreamStatus& status,
                             const std::optional<LastFeedback>& last,
                             const std::string& legend, size_t width);

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_STATUS_LINE_H_

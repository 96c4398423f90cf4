// The client clock: CLOCK_MONOTONIC read with clock_gettime.
//
// Clients stamp event times and answer clock probes with the same clock, so
// the server's clock model for the client (design.md §4) maps exactly the
// clock that event times are on. CLOCK_MONOTONIC is used because it never
// steps (NTP only slews it) and because it is the clock Linux can put on
// input events (evdev EVIOCSCLOCKID), so every source on one machine shares it.
//
// Stateless; thread-safe.
#ifndef TICKMARK_CLIENTS_COMMON_MONOTONIC_CLOCK_H_
#define TICKMARK_CLIENTS_COMMON_MONOTONIC_CLOCK_H_

#include <cstdint>

#include "server/core/time.h"

namespace tickmark::client {

class SystemMonotonic final : public MonotonicSource {
 public:
  int64_t NowNanos() const override;
  // A process-wide instance, for defaults.
  static const SystemMonotonic* Get();
};

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_MONOTONIC_CLOCK_H_

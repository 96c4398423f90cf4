// The client clock: CLOCK_MONOTONIC read with clock_gettime.
//
// Clients stamp event times and answer clock probes with the same clock, so
// the server's clock model for the client (docs/architecture.md §4) maps exactly the
// clock that event times are on. CLOCK_MONOTONIC is used because it never
// steps (NTP only slews it) and because it is the clock Linux can put on
// input events (evdev EVIOCSCLOCKID), so every source on one machine shares it.
//
// The clock itself is tickmark::SystemMonotonic (server/core/time.h); this
// header only keeps the spelling client::SystemMonotonic::Get() working for
// programs that use it. New code should use tickmark::SystemMonotonic.
//
// Stateless; thread-safe.
#ifndef TICKMARK_CLIENTS_COMMON_MONOTONIC_CLOCK_H_
#define TICKMARK_CLIENTS_COMMON_MONOTONIC_CLOCK_H_

#include "server/core/time.h"

namespace tickmark::client {

struct SystemMonotonic {
  // A process-wide instance, for defaults.
  static const tickmark::SystemMonotonic* Get() {
    static const tickmark::SystemMonotonic kInstance;
    return &kInstance;
  }
};

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_MONOTONIC_CLOCK_H_

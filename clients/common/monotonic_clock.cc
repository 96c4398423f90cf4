#include "clients/common/monotonic_clock.h"

#include <time.h>

namespace tickmark::client {

int64_t SystemMonotonic::NowNanos() const {
  timespec ts{};
  // CLOCK_MONOTONIC cannot fail on Linux with a valid pointer.
  clock_gettime(CLOCK_MONOTONIC, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 +
         static_cast<int64_t>(ts.tv_nsec);
}

const SystemMonotonic* SystemMonotonic::Get() {
  static const SystemMonotonic kInstance;
  return &kInstance;
}

}  // namespace tickmark::client

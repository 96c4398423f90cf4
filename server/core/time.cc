#include "server/core/time.h"

#include <time.h>

namespace tickmark {

int64_t SystemMonotonic::NowNanos() const {
  timespec ts{};
  clock_gettime(CLOCK_MONOTONIC, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 + ts.tv_nsec;
}

const SystemMonotonic* SystemMonotonic::Get() {
  static const SystemMonotonic kInstance;
  return &kInstance;
}

}  // namespace tickmark

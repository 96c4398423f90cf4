// Fuzzes delay-kernel text (server/core/delay_kernel.h, DelayKernel::Parse),
// which arrives from flags, TOML configs and the admin API. Checks what the
// header promises for every kernel Parse accepts: Parse(Describe()) gives the
// same kernel; the cut CDF is finite, within [0, 1], non-decreasing, exactly
// 0 at the lower bound and 1 at the horizon; the horizon lies within
// kMaxHorizon; credit of any step is finite and within [0, 1].
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <string>
#include <string_view>

#include "server/core/delay_kernel.h"

namespace {

bool Unit(double v) { return std::isfinite(v) && v >= 0 && v <= 1; }

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  using tickmark::DelayKernel;
  using tickmark::Duration;
  using tickmark::SessionTime;
  const std::string_view text(reinterpret_cast<const char*>(data), size);
  std::string error;
  const auto kernel = DelayKernel::Parse(text, &error);
  if (!kernel) {
    if (error.empty()) __builtin_trap();  // a refusal says why
    return 0;
  }
  const auto again = DelayKernel::Parse(kernel->Describe());
  if (!again || !(*again == *kernel)) __builtin_trap();

  const Duration lower = kernel->LowerBound();
  const Duration horizon = kernel->Horizon();
  if (lower < Duration::Zero() || horizon < lower || horizon > DelayKernel::kMaxHorizon) {
    __builtin_trap();
  }
  if (kernel->CutCdf(lower) != 0 || kernel->CutCdf(horizon) != 1) __builtin_trap();
  double previous = 0;
  constexpr int kPoints = 16;
  for (int i = 0; i <= kPoints; ++i) {
    const Duration d =
        Duration::Nanos(lower.nanos() + (horizon.nanos() - lower.nanos()) / kPoints * i);
    const double f = kernel->CutCdf(d);
    if (!Unit(f) || f < previous || !Unit(kernel->Cdf(d))) __builtin_trap();
    previous = f;
  }
  for (double p : {0.25, 0.5, kernel->horizon_quantile()}) {
    if (!(p > 0 && p < 1)) continue;
    const Duration q = kernel->Quantile(p);
    if (q < Duration::Zero()) __builtin_trap();
  }
  const SessionTime t = SessionTime::FromNanos(int64_t{1} << 60);
  const double c = tickmark::Credit(*kernel, t, t - horizon, t - lower);
  if (!Unit(c)) __builtin_trap();
  return 0;
}

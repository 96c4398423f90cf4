#include "server/core/gamma_fit.h"

#include <cmath>

#include <boost/math/policies/policy.hpp>
#include <boost/math/special_functions/digamma.hpp>
#include <boost/math/special_functions/trigamma.hpp>

#include "server/core/internal/boost_policy.h"

namespace tickmark {
namespace {

using BoostPolicy = internal::NoThrowPolicy;

constexpr int kMaxIterations = 100;
// Newton steps end in a 1–2 ulp oscillation, so stop a little above that.
constexpr double kRelativeTolerance = 1e-14;

}  // namespace

std::optional<GammaFit> FitGamma(std::span<const double> seconds) {
  if (seconds.size() < 2) return std::nullopt;
  double sum = 0, sum_log = 0;
  for (double x : seconds) {
    if (!std::isfinite(x) || x <= 0) return std::nullopt;
    sum += x;
    sum_log += std::log(x);
  }
  const double n = static_cast<double>(seconds.size());
  const double mean = sum / n;
  const double mean_log = sum_log / n;
  // s >= 0 by Jensen; s == 0 (all equal, or rounding) has no finite maximum.
  const double s = std::log(mean) - mean_log;
  if (!(s > 0) || !std::isfinite(mean)) return std::nullopt;

  // Minka's closed-form start, within 1.5% of the answer, then the
  // generalised Newton update on 1/a, which converges in a few steps.
  double a = (3 - s + std::sqrt((s - 3) * (s - 3) + 24 * s)) / (12 * s);
  GammaFit fit;
  for (int i = 1; i <= kMaxIterations; ++i) {
    const double inv = 1 / a + (mean_log - std::log(mean) + std::log(a) -
                                boost::math::digamma(a, BoostPolicy())) /
                                   (a * a * (1 / a - boost::math::trigamma(a, BoostPolicy())));
    const double next = 1 / inv;
    if (!std::isfinite(next) || next <= 0) return std::nullopt;
    fit.iterations = i;
    const bool done = std::abs(next - a) <= kRelativeTolerance * next;
    a = next;
    if (done) break;
  }
  fit.shape = a;
  fit.scale_seconds = mean / a;
  return fit;
}

}  // namespace tickmark

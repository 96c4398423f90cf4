#include "server/core/ex_gaussian.h"

#include <cmath>
#include <limits>

#include "server/core/internal/normal.h"

namespace tickmark {
namespace {

using internal::kLogSqrt2Pi;
// Below this, Phi(t) is taken through the Mills ratio instead of erfc, whose
// result underflows long before the product with the exponential does.
constexpr double kTailStart = -5.0;

double Phi(double t) { return internal::NormalCdf(t); }

// Phi(t) / phi(t) for t <= kTailStart by Laplace's continued fraction
// 1/(s + 1/(s + 2/(s + 3/(s + ...)))), s = -t, evaluated bottom up; at
// s >= 5 sixty terms are far past double precision.
double LowerMillsRatio(double t) {
  const double s = -t;
  double f = s;
  for (int k = 60; k >= 1; --k) f = s + k / f;
  return 1 / f;
}

// ln Phi(t), finite for every finite t.
double LogPhi(double t) {
  if (t >= kTailStart) return std::log(Phi(t));
  return -0.5 * t * t - kLogSqrt2Pi + std::log(LowerMillsRatio(t));
}

}  // namespace

double ExGaussianCdf(double x, double mu, double sigma, double tau) {
  const double u = (x - mu) / sigma;
  const double r = sigma / tau;
  const double b = u - r;
  double tail;
  if (b >= kTailStart) {
    // Here -u r + r^2/2 <= 5 r - r^2/2 <= 12.5: no overflow.
    tail = std::exp(-u * r + 0.5 * r * r) * Phi(b);
  } else {
    // exp(-u r + r^2/2) Phi(b) = phi(u) * Phi(b) / phi(b), since
    // -u r + r^2/2 - b^2/2 = -u^2/2.
    tail = std::exp(-0.5 * u * u - kLogSqrt2Pi) * LowerMillsRatio(b);
  }
  const double p = Phi(u) - tail;
  if (!(p > 0)) return 0.0;
  return p < 1 ? p : 1.0;
}

double ExGaussianLogPdf(double x, double mu, double sigma, double tau) {
  const double u = (x - mu) / sigma;
  const double r = sigma / tau;
  return -std::log(tau) - u * r + 0.5 * r * r + LogPhi(u - r);
}

double ExGaussianQuantile(double p, double mu, double sigma, double tau) {
  // The CDF is below p at mu - 40 sigma (normal part alone) and above it
  // once both parts are past their own p quantiles' generous bounds.
  double lo = mu - 40 * sigma;
  double hi = mu + 40 * sigma - tau * std::log1p(-p) + tau;
  for (int i = 0; i < 200 && hi - lo > 4 * std::numeric_limits<double>::epsilon() *
                                           (std::abs(lo) + std::abs(hi));
       ++i) {
    const double mid = 0.5 * (lo + hi);
    if (ExGaussianCdf(mid, mu, sigma, tau) >= p) {
      hi = mid;
    } else {
      lo = mid;
    }
  }
  return hi;
}

}  // namespace tickmark

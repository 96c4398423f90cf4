#include "server/core/delay_fit.h"

#include <algorithm>
#include <array>
#include <boost/math/special_functions/gamma.hpp>
#include <cmath>
#include <limits>
#include <random>
#include <utility>

#include "server/core/ex_gaussian.h"
#include "server/core/gamma_fit.h"
#include "server/core/internal/boost_policy.h"
#include "server/core/internal/normal.h"

namespace tickmark {
namespace {

using FitPolicy = internal::NoThrowPolicy;
using internal::kLogSqrt2Pi;
constexpr double kInf = std::numeric_limits<double>::infinity();
constexpr double kMinExGaussianSigma = 1e-3;  // seconds

bool UsableDelays(std::span<const double> x, size_t min_size) {
  if (x.size() < min_size) return false;
  for (double v : x) {
    // The bound keeps every delay convertible to a Duration.
    if (!std::isfinite(v) || v <= 0 || v > DelayKernel::kMaxHorizon.seconds()) return false;
  }
  return std::any_of(x.begin(), x.end(), [&](double v) { return v != x[0]; });
}

// Minimises f over R^3 by Nelder-Mead (standard coefficients 1, 2, 1/2,
// 1/2), restarted from the best vertex with a fresh simplex until a restart
// no longer improves, which guards against the method's premature collapse.
template <typename F>
std::array<double, 3> NelderMead(F f, std::array<double, 3> start, std::array<double, 3> step) {
  using Point = std::array<double, 3>;
  double best_value = f(start);
  for (int restart = 0; restart < 8; ++restart) {
    std::array<Point, 4> p;
    std::array<double, 4> v;
    p[0] = start;
    v[0] = best_value;
    for (int i = 0; i < 3; ++i) {
      p[i + 1] = start;
      p[i + 1][i] += step[i];
      v[i + 1] = f(p[i + 1]);
    }
    for (int iter = 0; iter < 2000; ++iter) {
      std::array<int, 4> order = {0, 1, 2, 3};
      std::sort(order.begin(), order.end(), [&](int a, int b) { return v[a] < v[b]; });
      const int lo = order[0], hi = order[3], second = order[2];
      if (std::abs(v[hi] - v[lo]) <= 1e-13 * (1 + std::abs(v[lo]))) break;
      Point centroid{};
      for (int i : {order[0], order[1], order[2]}) {
        for (int d = 0; d < 3; ++d) centroid[d] += p[i][d] / 3;
      }
      auto along = [&](double t) {
        Point q;
        for (int d = 0; d < 3; ++d) q[d] = centroid[d] + t * (p[hi][d] - centroid[d]);
        return q;
      };
      const Point reflected = along(-1);
      const double fr = f(reflected);
      if (fr < v[lo]) {
        const Point expanded = along(-2);
        const double fe = f(expanded);
        if (fe < fr) {
          p[hi] = expanded, v[hi] = fe;
        } else {
          p[hi] = reflected, v[hi] = fr;
        }
      } else if (fr < v[second]) {
        p[hi] = reflected, v[hi] = fr;
      } else {
        const bool outside = fr < v[hi];
        const Point contracted = along(outside ? -0.5 : 0.5);
        const double fc = f(contracted);
        if (fc < (outside ? fr : v[hi])) {
          p[hi] = contracted, v[hi] = fc;
        } else {
          for (int i : {order[1], order[2], order[3]}) {
            for (int d = 0; d < 3; ++d) p[i][d] = p[lo][d] + 0.5 * (p[i][d] - p[lo][d]);
            v[i] = f(p[i]);
          }
        }
      }
    }
    const int lo = static_cast<int>(std::min_element(v.begin(), v.end()) - v.begin());
    const bool improved = v[lo] < best_value - 1e-12 * (1 + std::abs(best_value));
    if (v[lo] <= best_value) {
      start = p[lo];
      best_value = v[lo];
    }
    if (!improved && restart > 0) break;
    for (double& s : step) s *= 0.5;
  }
  return start;
}

double Mean(std::span<const double> x) {
  double s = 0;
  for (double v : x) s += v;
  return s / static_cast<double>(x.size());
}

}  // namespace

double GammaLogLikelihood(std::span<const double> seconds, double shape, double scale_seconds,
                          double shift_seconds) {
  // Boost rather than std::lgamma, which writes the global signgam.
  const double norm = boost::math::lgamma(shape, FitPolicy()) + shape * std::log(scale_seconds);
  double sum = 0;
  for (double x : seconds) {
    const double y = x - shift_seconds;
    if (!(y > 0)) return -kInf;
    sum += (shape - 1) * std::log(y) - y / scale_seconds - norm;
  }
  return sum;
}

double LognormalLogLikelihood(std::span<const double> seconds, double mu, double sigma) {
  double sum = 0;
  for (double x : seconds) {
    if (!(x > 0)) return -kInf;
    const double z = (std::log(x) - mu) / sigma;
    sum += -std::log(x) - std::log(sigma) - kLogSqrt2Pi - 0.5 * z * z;
  }
  return sum;
}

double ExGaussianLogLikelihood(std::span<const double> seconds, double mu, double sigma,
                               double tau) {
  double sum = 0;
  for (double x : seconds) sum += ExGaussianLogPdf(x, mu, sigma, tau);
  return sum;
}

std::optional<ShiftedGammaFit> FitShiftedGamma(std::span<const double> seconds) {
  if (!UsableDelays(seconds, 3)) return std::nullopt;
  std::vector<double> sorted(seconds.begin(), seconds.end());
  std::sort(sorted.begin(), sorted.end());
  const double gap = std::max(1e-3, 0.5 * (sorted[1] - sorted[0]));
  const double max_shift = std::max(0.0, sorted[0] - gap);
  std::vector<double> moved(sorted.size());
  // The profile: the gamma maximum of the sample moved left by the shift.
  auto profile = [&](double shift, GammaFit* out) {
    for (size_t i = 0; i < sorted.size(); ++i) moved[i] = sorted[i] - shift;
    std::optional<GammaFit> g = FitGamma(moved);
    if (!g) return -kInf;
    if (out != nullptr) *out = *g;
    return GammaLogLikelihood(moved, g->shape, g->scale_seconds, 0);
  };
  constexpr int kGrid = 48;
  int best = 0;
  double best_value = -kInf;
  for (int j = 0; j < kGrid; ++j) {
    const double value = profile(max_shift * j / (kGrid - 1), nullptr);
    if (value > best_value) best_value = value, best = j;
  }
  if (!std::isfinite(best_value)) return std::nullopt;
  // Golden-section search around the best grid point.
  double a = max_shift * std::max(0, best - 1) / (kGrid - 1);
  double b = max_shift * std::min(kGrid - 1, best + 1) / (kGrid - 1);
  const double g = 0.5 * (std::sqrt(5.0) - 1);
  double c = b - g * (b - a), d = a + g * (b - a);
  double fc = profile(c, nullptr), fd = profile(d, nullptr);
  for (int i = 0; i < 80 && b - a > 1e-12 * (1 + b); ++i) {
    if (fc >= fd) {
      b = d, d = c, fd = fc;
      c = b - g * (b - a);
      fc = profile(c, nullptr);
    } else {
      a = c, c = d, fc = fd;
      d = a + g * (b - a);
      fd = profile(d, nullptr);
    }
  }
  double shift = max_shift * best / (kGrid - 1);
  for (double candidate : {c, d}) {
    const double value = profile(candidate, nullptr);
    if (value > best_value) best_value = value, shift = candidate;
  }
  GammaFit fit;
  if (!std::isfinite(profile(shift, &fit))) return std::nullopt;
  return ShiftedGammaFit{fit.shape, fit.scale_seconds, shift};
}

std::optional<LognormalFit> FitLognormal(std::span<const double> seconds) {
  if (!UsableDelays(seconds, 2)) return std::nullopt;
  double mu = 0;
  for (double x : seconds) mu += std::log(x);
  mu /= static_cast<double>(seconds.size());
  double ss = 0;
  for (double x : seconds) ss += (std::log(x) - mu) * (std::log(x) - mu);
  const double sigma = std::sqrt(ss / static_cast<double>(seconds.size()));
  if (!(sigma > 0)) return std::nullopt;
  return LognormalFit{mu, sigma};
}

std::optional<ExGaussianFit> FitExGaussian(std::span<const double> seconds) {
  if (!UsableDelays(seconds, 3)) return std::nullopt;
  const double n = static_cast<double>(seconds.size());
  const double mean = Mean(seconds);
  double m2 = 0, m3 = 0;
  for (double x : seconds) {
    m2 += (x - mean) * (x - mean) / n;
    m3 += (x - mean) * (x - mean) * (x - mean) / n;
  }
  const double sd = std::sqrt(m2);
  // Moment start: the third central moment is 2 tau^3; a sample with no
  // right skew starts from a small tau instead.
  double tau = m3 > 0 ? std::cbrt(m3 / 2) : 0.1 * sd;
  tau = std::clamp(tau, 0.05 * sd, 0.95 * sd);
  const double sigma =
      std::max(std::sqrt(std::max(m2 - tau * tau, 0.01 * m2)), 2 * kMinExGaussianSigma);
  auto objective = [&](const std::array<double, 3>& p) {
    // Below the sources' timing resolution sigma is not identifiable, and
    // the likelihood of a near-exponential sample keeps growing as sigma
    // shrinks; the floor keeps the fit at a usable kernel.
    if (std::exp(p[1]) < kMinExGaussianSigma) return kInf;
    const double value = -ExGaussianLogLikelihood(seconds, p[0], std::exp(p[1]), std::exp(p[2]));
    return std::isfinite(value) ? value : kInf;
  };
  const std::array<double, 3> best =
      NelderMead(objective, {mean - tau, std::log(sigma), std::log(tau)}, {0.1 * sd, 0.2, 0.2});
  ExGaussianFit fit{best[0], std::exp(best[1]), std::exp(best[2])};
  if (!std::isfinite(fit.mu_seconds) || !(fit.sigma_seconds > 0) || !(fit.tau_seconds > 0) ||
      !std::isfinite(fit.tau_seconds)) {
    return std::nullopt;
  }
  return fit;
}

namespace {

constexpr double kMixtureMinWeight = 0.1;
constexpr double kMixtureMinSigma = 0.05;
constexpr Duration kMixtureBin = Duration::Millis(5);

double LogNormalDensity(double y, double mu, double sigma) {
  const double z = (y - mu) / sigma;
  return -0.5 * z * z - std::log(sigma) - kLogSqrt2Pi;
}

// ln of the mixture density of y = ln x (not of x).
double MixtureLogDensityOfLog(double y, const LognormalMixtureFit& f) {
  const double a = std::log(f.weight) + LogNormalDensity(y, f.mu1, f.sigma1);
  const double b = std::log1p(-f.weight) + LogNormalDensity(y, f.mu2, f.sigma2);
  const double m = std::max(a, b);
  return m + std::log(std::exp(a - m) + std::exp(b - m));
}

}  // namespace

double LognormalMixtureLogLikelihood(std::span<const double> seconds,
                                     const LognormalMixtureFit& fit) {
  double sum = 0;
  for (double x : seconds) {
    if (!(x > 0)) return -kInf;
    const double y = std::log(x);
    sum += MixtureLogDensityOfLog(y, fit) - y;
  }
  return sum;
}

double LognormalMixtureCdf(double seconds, const LognormalMixtureFit& f) {
  if (!(seconds > 0)) return 0.0;
  const double y = std::log(seconds);
  return f.weight * internal::NormalCdf((y - f.mu1) / f.sigma1) +
         (1 - f.weight) * internal::NormalCdf((y - f.mu2) / f.sigma2);
}

std::optional<DelayKernel> LognormalMixtureKernel(const LognormalMixtureFit& fit,
                                                  std::string* error) {
  // The 0.999 quantile, by bisection in log space between the components'
  // far quantiles.
  double lo = std::min(fit.mu1 - 10 * fit.sigma1, fit.mu2 - 10 * fit.sigma2);
  double hi = std::max(fit.mu1 + 10 * fit.sigma1, fit.mu2 + 10 * fit.sigma2);
  for (int i = 0; i < 200; ++i) {
    const double mid = 0.5 * (lo + hi);
    (LognormalMixtureCdf(std::exp(mid), fit) >= DelayKernel::kDefaultHorizonQuantile ? hi : lo) =
        mid;
  }
  const double end = std::exp(hi);
  const double bin = kMixtureBin.seconds();
  if (!std::isfinite(end) || end / bin > static_cast<double>(DelayKernel::kMaxEmpiricalBins)) {
    if (error != nullptr) *error = "mixture horizon too long for a histogram";
    return std::nullopt;
  }
  const size_t bins = static_cast<size_t>(std::ceil(end / bin));
  std::vector<double> counts(bins);
  double below = 0;
  for (size_t i = 0; i < bins; ++i) {
    const double above = LognormalMixtureCdf(static_cast<double>(i + 1) * bin, fit);
    counts[i] = std::max(0.0, above - below);
    below = above;
  }
  return DelayKernel::Empirical(Duration::Zero(), kMixtureBin, std::move(counts), error);
}

std::optional<LognormalMixtureFit> FitLognormalMixture(std::span<const double> seconds) {
  if (!UsableDelays(seconds, 5)) return std::nullopt;
  std::vector<double> y;
  for (double x : seconds) y.push_back(std::log(x));
  std::sort(y.begin(), y.end());
  const size_t n = y.size();
  auto log_likelihood = [&](const LognormalMixtureFit& f) {
    double sum = 0;
    for (double v : y) sum += MixtureLogDensityOfLog(v, f);
    return sum;
  };
  std::optional<LognormalMixtureFit> best;
  double best_value = -kInf;
  std::vector<double> r(n);
  for (double split : {0.2, 0.35, 0.5, 0.65, 0.8}) {
    // Start: the lower and upper parts of the sorted sample.
    const size_t cut =
        std::clamp<size_t>(static_cast<size_t>(split * static_cast<double>(n)), 2, n - 2);
    auto moments = [&](size_t b, size_t e, double* mu, double* sigma) {
      double m = 0, ss = 0;
      for (size_t i = b; i < e; ++i) m += y[i];
      m /= static_cast<double>(e - b);
      for (size_t i = b; i < e; ++i) ss += (y[i] - m) * (y[i] - m);
      *mu = m;
      *sigma = std::max(std::sqrt(ss / static_cast<double>(e - b)), kMixtureMinSigma);
    };
    LognormalMixtureFit f;
    f.weight = std::clamp(static_cast<double>(cut) / static_cast<double>(n), kMixtureMinWeight,
                          1 - kMixtureMinWeight);
    moments(0, cut, &f.mu1, &f.sigma1);
    moments(cut, n, &f.mu2, &f.sigma2);
    double value = -kInf;
    for (int iter = 0; iter < 1000; ++iter) {
      // E step: each answer's responsibility of component 1, and the
      // log-likelihood of the current parameters on the way.
      double r_sum = 0, current = 0;
      const double log_w1 = std::log(f.weight), log_w2 = std::log1p(-f.weight);
      for (size_t i = 0; i < n; ++i) {
        const double a = log_w1 + LogNormalDensity(y[i], f.mu1, f.sigma1);
        const double b = log_w2 + LogNormalDensity(y[i], f.mu2, f.sigma2);
        r[i] = 1 / (1 + std::exp(b - a));
        r_sum += r[i];
        current += std::max(a, b) + std::log1p(std::exp(-std::abs(a - b)));
      }
      // EM never lowers the likelihood; stop once it no longer rises.
      const bool done = current - value <= 1e-10 * (1 + std::abs(current));
      value = current;
      if (done) break;
      const double s_sum = static_cast<double>(n) - r_sum;
      if (!(r_sum > 0) || !(s_sum > 0)) break;
      // M step, each parameter clamped to its bound (still an ascent step:
      // the expected log-likelihood is concave in each).
      double m1 = 0, m2 = 0;
      for (size_t i = 0; i < n; ++i) m1 += r[i] * y[i], m2 += (1 - r[i]) * y[i];
      m1 /= r_sum, m2 /= s_sum;
      double v1 = 0, v2 = 0;
      for (size_t i = 0; i < n; ++i) {
        v1 += r[i] * (y[i] - m1) * (y[i] - m1);
        v2 += (1 - r[i]) * (y[i] - m2) * (y[i] - m2);
      }
      f.weight =
          std::clamp(r_sum / static_cast<double>(n), kMixtureMinWeight, 1 - kMixtureMinWeight);
      f.mu1 = m1, f.mu2 = m2;
      f.sigma1 = std::max(std::sqrt(v1 / r_sum), kMixtureMinSigma);
      f.sigma2 = std::max(std::sqrt(v2 / s_sum), kMixtureMinSigma);
    }
    value = log_likelihood(f);
    if (std::isfinite(value) && value > best_value) {
      best_value = value;
      best = f;
    }
  }
  if (!best) return std::nullopt;
  if (best->mu1 > best->mu2) {
    std::swap(best->mu1, best->mu2);
    std::swap(best->sigma1, best->sigma2);
    best->weight = 1 - best->weight;
  }
  return best;
}

double KsDistance(std::span<const double> seconds, const DelayKernel& kernel) {
  std::vector<double> sorted(seconds.begin(), seconds.end());
  std::sort(sorted.begin(), sorted.end());
  const double n = static_cast<double>(sorted.size());
  double d = 0;
  for (size_t i = 0; i < sorted.size(); ++i) {
    const double f = kernel.Cdf(Duration::FromSeconds(sorted[i]));
    d = std::max({d, f - static_cast<double>(i) / n, static_cast<double>(i + 1) / n - f});
  }
  return d;
}

const char* DelayFamilyName(DelayFamily family) {
  switch (family) {
    case DelayFamily::kGamma:
      return "gamma";
    case DelayFamily::kShiftedGamma:
      return "shifted-gamma";
    case DelayFamily::kLognormal:
      return "lognormal";
    case DelayFamily::kExGaussian:
      return "exgauss";
    case DelayFamily::kLognormalMixture:
      return "lognormal-mixture";
  }
  return "";
}

namespace {

// Fits one family; kernel empty (and error set) when it does not fit.
FamilyFit FitFamily(DelayFamily family, std::span<const double> x) {
  FamilyFit out;
  out.family = family;
  std::string error = "no maximum-likelihood fit";
  switch (family) {
    case DelayFamily::kGamma:
      out.parameters = 2;
      if (auto g = FitGamma(x)) {
        out.kernel = DelayKernel::Gamma(g->shape, g->scale_seconds, Duration::Zero(),
                                        DelayKernel::kDefaultHorizonQuantile, &error);
        out.log_likelihood = GammaLogLikelihood(x, g->shape, g->scale_seconds, 0);
        out.mean_seconds = g->shape * g->scale_seconds;
      }
      break;
    case DelayFamily::kShiftedGamma:
      out.parameters = 3;
      if (auto g = FitShiftedGamma(x)) {
        // The kernel's shift is whole nanoseconds; the likelihood is taken
        // at that shift so that it describes the kernel handed out.
        const Duration shift = Duration::FromSeconds(g->shift_seconds);
        out.kernel = DelayKernel::Gamma(g->shape, g->scale_seconds, shift,
                                        DelayKernel::kDefaultHorizonQuantile, &error);
        out.log_likelihood = GammaLogLikelihood(x, g->shape, g->scale_seconds, shift.seconds());
        out.mean_seconds = shift.seconds() + g->shape * g->scale_seconds;
      }
      break;
    case DelayFamily::kLognormal:
      out.parameters = 2;
      if (auto l = FitLognormal(x)) {
        out.kernel = DelayKernel::Lognormal(l->mu, l->sigma, Duration::Zero(),
                                            DelayKernel::kDefaultHorizonQuantile, &error);
        out.log_likelihood = LognormalLogLikelihood(x, l->mu, l->sigma);
        out.mean_seconds = std::exp(l->mu + 0.5 * l->sigma * l->sigma);
      }
      break;
    case DelayFamily::kExGaussian:
      out.parameters = 3;
      if (auto e = FitExGaussian(x)) {
        out.kernel = DelayKernel::ExGaussian(e->mu_seconds, e->sigma_seconds, e->tau_seconds,
                                             DelayKernel::kDefaultHorizonQuantile, &error);
        out.log_likelihood =
            ExGaussianLogLikelihood(x, e->mu_seconds, e->sigma_seconds, e->tau_seconds);
        out.mean_seconds = e->mu_seconds + e->tau_seconds;
      }
      break;
    case DelayFamily::kLognormalMixture:
      out.parameters = 5;
      if (auto m = FitLognormalMixture(x)) {
        out.kernel = LognormalMixtureKernel(*m, &error);
        out.log_likelihood = LognormalMixtureLogLikelihood(x, *m);
        out.mean_seconds = m->weight * std::exp(m->mu1 + 0.5 * m->sigma1 * m->sigma1) +
                           (1 - m->weight) * std::exp(m->mu2 + 0.5 * m->sigma2 * m->sigma2);
      }
      break;
  }
  if (out.kernel && !std::isfinite(out.log_likelihood)) {
    out.kernel.reset();
    error = "log-likelihood not finite";
  }
  if (!out.kernel) {
    out.error = error;
    return out;
  }
  out.aic = 2.0 * out.parameters - 2 * out.log_likelihood;
  out.ks_distance = KsDistance(x, *out.kernel);
  out.p90_seconds = out.kernel->Quantile(0.9).seconds();
  return out;
}

// Percentile interval of values at the given central level.
Interval PercentileInterval(std::vector<double> values, double level) {
  std::sort(values.begin(), values.end());
  auto at = [&](double p) {
    const double pos = p * static_cast<double>(values.size() - 1);
    const size_t i = static_cast<size_t>(pos);
    const double frac = pos - static_cast<double>(i);
    return i + 1 < values.size() ? values[i] + frac * (values[i + 1] - values[i]) : values[i];
  };
  return {at(0.5 * (1 - level)), at(0.5 * (1 + level))};
}

}  // namespace

std::optional<DelayFitReport> FitDelays(std::span<const double> seconds,
                                        const DelayFitOptions& options, std::string* error) {
  auto fail = [&](const char* why) {
    if (error != nullptr) *error = why;
    return std::nullopt;
  };
  if (seconds.size() < 3) return fail("fewer than 3 delays");
  if (!UsableDelays(seconds, 3))
    return fail("a delay is not finite, <= 0 or > 86400 s, or all are equal");
  DelayFitReport report;
  report.answers = seconds.size();
  double best_aic = kInf;
  for (DelayFamily family :
       {DelayFamily::kGamma, DelayFamily::kShiftedGamma, DelayFamily::kLognormal,
        DelayFamily::kExGaussian, DelayFamily::kLognormalMixture}) {
    report.fits.push_back(FitFamily(family, seconds));
    const FamilyFit& f = report.fits.back();
    if (f.kernel && f.aic < best_aic) {
      best_aic = f.aic;
      report.chosen = report.fits.size() - 1;
    }
  }
  if (!std::isfinite(best_aic)) return fail("no family could be fitted");
  const FamilyFit& chosen = report.fits[report.chosen];
  const double n = static_cast<double>(seconds.size());
  report.ks_threshold = options.ks_coefficient / std::sqrt(n);
  report.too_few_answers = seconds.size() < options.min_answers;
  report.poor_fit = chosen.ks_distance > report.ks_threshold;

  if (options.bootstrap_resamples > 0) {
    std::mt19937_64 rng(options.bootstrap_seed);
    std::uniform_int_distribution<size_t> pick(0, seconds.size() - 1);
    std::vector<double> resample(seconds.size()), means, p90s;
    for (int r = 0; r < options.bootstrap_resamples; ++r) {
      for (double& v : resample) v = seconds[pick(rng)];
      const FamilyFit f = FitFamily(chosen.family, resample);
      if (!f.kernel) continue;  // e.g. a resample of equal values
      means.push_back(f.mean_seconds);
      p90s.push_back(f.p90_seconds);
    }
    if (!means.empty()) {
      report.mean_seconds = PercentileInterval(std::move(means), options.interval_level);
      report.p90_seconds = PercentileInterval(std::move(p90s), options.interval_level);
    }
  }
  return report;
}

}  // namespace tickmark

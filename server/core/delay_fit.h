// Calibration fitting: turns a trainer's measured delays into
// a delay kernel. Five families are fitted by maximum likelihood and compared
// by AIC = 2k - 2 ln L:
//   gamma          shape, scale; shift 0 (Minka 2002, gamma_fit.h)   k = 2
//   shifted gamma  shape, scale, shift: the gamma fit profiled over the
//                  shift in [0, min(x) - gap], gap = max(1 ms, half the
//                  distance between the two smallest delays), which keeps
//                  the likelihood bounded when the shape is below 1   k = 3
//   lognormal      mu, sigma of ln x; shift 0; closed form            k = 2
//   ex-Gaussian    mu, sigma, tau; Nelder-Mead on (mu, ln sigma, ln tau)
//                  from the moment estimates, restarted until it stops
//                  improving; the plain (not zero-cut) likelihood;
//                  sigma >= 1 ms, below which a near-exponential sample
//                  drives the likelihood up without bound            k = 3
//   lognormal      two lognormal components (weight, mu1, sigma1, mu2,
//   mixture        sigma2) by EM on ln x from five splits of the sorted
//                  sample, each weight >= 0.1 and each sigma >= 0.05
//                  (so no component collapses onto a few answers); a
//                  trainer with fast answers and slow second looks is
//                  bimodal, which no single family above can follow.
//                  Its kernel is an empirical one: 5 ms bins of the
//                  fitted CDF up to its 0.999 quantile               k = 5
// Each fit also gets its Kolmogorov-Smirnov distance to the sample. The
// lowest AIC is chosen; a nonparametric bootstrap (resample the delays,
// refit the chosen family) gives intervals for its mean and 90th percentile.
// A warning is raised when there are fewer delays than a minimum or when the
// chosen fit's KS distance exceeds c / sqrt(n) (c = 1.36: the asymptotic 5%
// critical value of the Kolmogorov distribution, from memory; conservative
// here, since the parameters were fitted to the same sample).
//
// Pure functions; thread-safe. Delays are in seconds, each finite, > 0 and
// at most 86400 s (DelayKernel::kMaxHorizon).
#ifndef TICKMARK_SERVER_CORE_DELAY_FIT_H_
#define TICKMARK_SERVER_CORE_DELAY_FIT_H_

#include <cstddef>
#include <cstdint>
#include <optional>
#include <span>
#include <string>
#include <vector>

#include "server/core/delay_kernel.h"

namespace tickmark {

struct ShiftedGammaFit {
  double shape = 0;
  double scale_seconds = 0;
  double shift_seconds = 0;
};
struct LognormalFit {
  double mu = 0;     // mean of ln(seconds)
  double sigma = 0;  // ML (divide by n) standard deviation of ln(seconds)
};
struct ExGaussianFit {
  double mu_seconds = 0;
  double sigma_seconds = 0;
  double tau_seconds = 0;
};

struct LognormalMixtureFit {
  double weight = 0;                                // of component 1, the one with the lower mu
  double mu1 = 0, sigma1 = 0, mu2 = 0, sigma2 = 0;  // of ln(seconds)
};

// Each returns nullopt for fewer than 2 (3 for the three-parameter
// families, 5 for the mixture) delays, a delay not finite or <= 0, or all
// delays equal, or a delay over 86400 s.
std::optional<ShiftedGammaFit> FitShiftedGamma(std::span<const double> seconds);
std::optional<LognormalFit> FitLognormal(std::span<const double> seconds);
std::optional<ExGaussianFit> FitExGaussian(std::span<const double> seconds);
std::optional<LognormalMixtureFit> FitLognormalMixture(std::span<const double> seconds);

// The mixture's CDF at x seconds, and its kernel (see above).
double LognormalMixtureCdf(double seconds, const LognormalMixtureFit& fit);
std::optional<DelayKernel> LognormalMixtureKernel(const LognormalMixtureFit& fit,
                                                  std::string* error = nullptr);

// Log-likelihoods of a sample under the families (seconds).
double GammaLogLikelihood(std::span<const double> seconds, double shape, double scale_seconds,
                          double shift_seconds);
double LognormalLogLikelihood(std::span<const double> seconds, double mu, double sigma);
double ExGaussianLogLikelihood(std::span<const double> seconds, double mu, double sigma,
                               double tau);
double LognormalMixtureLogLikelihood(std::span<const double> seconds,
                                     const LognormalMixtureFit& fit);

// sup_x |F_n(x) - F(x)| with F the kernel's (uncut) Cdf.
double KsDistance(std::span<const double> seconds, const DelayKernel& kernel);

enum class DelayFamily { kGamma, kShiftedGamma, kLognormal, kExGaussian, kLognormalMixture };
const char* DelayFamilyName(DelayFamily family);  // "gamma", "shifted-gamma", ...

struct DelayFitOptions {
  size_t min_answers = 40;         // fewer: warning
  double ks_coefficient = 1.36;    // warn when KS > ks_coefficient / sqrt(n)
  int bootstrap_resamples = 1000;  // 0: no intervals
  uint64_t bootstrap_seed = 1;     // same seed and sample, same intervals
  double interval_level = 0.95;    // central percentile interval
};

struct FamilyFit {
  DelayFamily family = DelayFamily::kGamma;
  int parameters = 0;                 // k in the AIC
  std::optional<DelayKernel> kernel;  // nullopt: this family did not fit
  std::string error;                  // why not, when kernel is empty
  double log_likelihood = 0;
  double aic = 0;
  double ks_distance = 0;
  double mean_seconds = 0;  // of the fitted distribution
  double p90_seconds = 0;   // its 0.9 quantile
};

struct Interval {
  double low = 0;
  double high = 0;
};

struct DelayFitReport {
  size_t answers = 0;
  std::vector<FamilyFit> fits;  // one per DelayFamily, in enum order
  size_t chosen = 0;            // index into fits: the lowest AIC
  DelayKernel kernel() const { return *fits[chosen].kernel; }
  std::optional<Interval> mean_seconds;  // bootstrap, chosen family
  std::optional<Interval> p90_seconds;   // bootstrap, chosen family
  double ks_threshold = 0;               // ks_coefficient / sqrt(n)
  bool too_few_answers = false;
  bool poor_fit = false;  // chosen fit's KS over ks_threshold
  bool warning() const { return too_few_answers || poor_fit; }
};

// Fits every family and chooses one. nullopt (and *error) when no family
// fits: fewer than 3 delays, a delay not finite, <= 0 or > 86400 s, or all
// equal.
std::optional<DelayFitReport> FitDelays(std::span<const double> seconds,
                                        const DelayFitOptions& options = {},
                                        std::string* error = nullptr);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_DELAY_FIT_H_

// Maximum-likelihood fit of a gamma distribution to delay samples
// (Minka 2002, "Estimating a Gamma distribution"), used by calibration
// (docs/architecture.md §5) to turn a trainer's reaction-test delays into a gamma
// delay kernel (DelayKernel::Gamma(fit.shape, fit.scale_seconds, shift)).
//
// Pure function; thread-safe.
#ifndef TICKMARK_SERVER_CORE_GAMMA_FIT_H_
#define TICKMARK_SERVER_CORE_GAMMA_FIT_H_

#include <optional>
#include <span>

namespace tickmark {

struct GammaFit {
  double shape = 0;          // a
  double scale_seconds = 0;  // mean / a
  int iterations = 0;        // Newton steps taken
};

// Fits shape and scale to samples (seconds). Returns nullopt when the
// maximum does not exist or the input is unusable: fewer than 2 samples, a
// sample not finite or <= 0, or all samples equal (the likelihood then grows
// without bound in the shape).
std::optional<GammaFit> FitGamma(std::span<const double> seconds);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_GAMMA_FIT_H_

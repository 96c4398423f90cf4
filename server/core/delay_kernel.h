// DelayKernel: a trainer's delay distribution (docs/architecture.md §2, §5).
//
// The kernel is the distribution of the time between the moment a trainer
// judges an agent step and the moment their feedback is timestamped. Credit
// for a step [s, e) from feedback at t_f is F(t_f - s) - F(t_f - e), where F
// is the kernel's *cut* CDF: kernels with unbounded support are cut at their
// horizon (the horizon_quantile quantile, default 0.999) and renormalised, so
// every feedback distributes exactly mass 1 over a finite window and steps
// can settle.
//
// Kinds:
//   uniform[a, b)              F rises linearly from a to b.
//   gamma(shape, scale, shift) F(d) = P(shape, (d - shift) / scale).
//   exponential(rate, shift)   F(d) = 1 - exp(-rate (d - shift)).
//   empirical(first edge, bin width, counts)  histogram from calibration,
//                              piecewise-linear CDF through the bin edges.
//   lognormal(mu, sigma, shift)  ln((d - shift) / 1 s) ~ N(mu, sigma^2).
//   exgauss(mu, sigma, tau)    normal(mu, sigma) + exponential(mean tau),
//                              seconds, conditioned on d > 0: F(d) =
//                              (G(d) - G(0)) / (1 - G(0)), G the plain
//                              ex-Gaussian CDF (ex_gaussian.h). Fits of
//                              real delays have G(0) below 1e-6; the
//                              factories refuse G(0) > 0.5.
// Every kind has support at or after zero delay (a >= 0, shift >= 0,
// first edge >= 0): a human cannot react before the act, and the credit
// engine relies on this to never credit a step that started after a
// feedback's event time.
//
// A DelayKernel is an immutable value, built only through the validating
// factories or Parse(); thread-compatible, cheap to copy except for the
// empirical kind (which owns its counts).
#ifndef TICKMARK_SERVER_CORE_DELAY_KERNEL_H_
#define TICKMARK_SERVER_CORE_DELAY_KERNEL_H_

#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "server/core/time.h"

namespace tickmark {

class DelayKernel {
 public:
  enum class Kind { kUniform, kGamma, kExponential, kEmpirical, kLognormal, kExGaussian };

  static constexpr double kDefaultHorizonQuantile = 0.999;
  // No human delay model needs a longer window; the bound keeps every
  // horizon sum far from int64 overflow.
  static constexpr Duration kMaxHorizon = Duration::Seconds(86400);
  // Bounds the memory a parsed or received histogram can claim.
  static constexpr size_t kMaxEmpiricalBins = 1 << 16;

  // The factories return nullopt and set *error (if given) when a parameter
  // is not finite, not positive where it must be, lower >= upper, or the
  // horizon exceeds kMaxHorizon.
  static std::optional<DelayKernel> Uniform(Duration lower, Duration upper,
                                            std::string* error = nullptr);
  // scale_seconds: the gamma scale in seconds (kept as a double, as fitted).
  static std::optional<DelayKernel> Gamma(
      double shape, double scale_seconds, Duration shift,
      double horizon_quantile = kDefaultHorizonQuantile,
      std::string* error = nullptr);
  static std::optional<DelayKernel> Exponential(
      double rate_per_second, Duration shift,
      double horizon_quantile = kDefaultHorizonQuantile,
      std::string* error = nullptr);
  // mu and sigma of ln(delay - shift in seconds); sigma > 0.
  static std::optional<DelayKernel> Lognormal(
      double mu, double sigma, Duration shift,
      double horizon_quantile = kDefaultHorizonQuantile,
      std::string* error = nullptr);
  // mu, sigma and tau in seconds; sigma, tau > 0.
  static std::optional<DelayKernel> ExGaussian(
      double mu_seconds, double sigma_seconds, double tau_seconds,
      double horizon_quantile = kDefaultHorizonQuantile,
      std::string* error = nullptr);
  // Bin i covers [first_edge + i*bin_width, first_edge + (i+1)*bin_width).
  // Counts must be finite, non-negative, and not all zero.
  static std::optional<DelayKernel> Empirical(Duration first_edge,
                                              Duration bin_width,
                                              std::vector<double> counts,
                                              std::string* error = nullptr);

  // Parses either the short form (numbers in seconds, rate per second)
  //   "uniform:0.2,4.0"  "gamma:2,0.28[,shift]"  "exponential:2.5[,shift]"
  //   "empirical:first_edge,bin_width,count0,count1,..."
  //   "lognormal:mu,sigma[,shift]"  "exgauss:mu,sigma,tau"
  // optionally followed by ",q=0.99" for the unbounded kinds, or the
  // Describe() form, so Parse(k.Describe()) == k. Whitespace around tokens
  // is ignored.
  static std::optional<DelayKernel> Parse(std::string_view text,
                                          std::string* error = nullptr);

  // Stable text naming the kernel in ledger records, e.g.
  // "gamma(shape=2,scale=0.28s,shift=0s,q=0.999)". Numbers are printed in
  // their shortest round-trip form, times exactly from nanoseconds.
  std::string Describe() const;

  Kind kind() const { return kind_; }
  // The uncut CDF: P(delay <= d). 0 for d at or below the lower bound.
  double Cdf(Duration d) const;
  // The cut, renormalised CDF used for credit: Cdf(min(d, H)) / Cdf(H).
  // Exactly 0 at or below LowerBound() and exactly 1 at or above Horizon().
  double CutCdf(Duration d) const;
  // The uncut quantile: the smallest delay d with Cdf(d) >= p, p in (0, 1).
  Duration Quantile(double p) const;
  // Lowest delay with positive density (a, shift, zero for exgauss, or the
  // first non-empty bin's edge).
  Duration LowerBound() const { return lower_; }
  // Upper end of support for bounded kinds; the horizon_quantile quantile,
  // rounded to the nanosecond, for unbounded kinds.
  Duration Horizon() const { return horizon_; }
  // Cdf(Horizon()): 1 for bounded kinds, about horizon_quantile otherwise.
  double CdfAtHorizon() const { return cdf_at_horizon_; }

  // Parameters, meaningful for the kinds that have them.
  double shape() const { return shape_; }
  double scale_seconds() const { return scale_s_; }
  double rate_per_second() const { return rate_; }
  // Lognormal: of ln(seconds); ex-Gaussian: seconds.
  double mu() const { return mu_; }
  double sigma() const { return sigma_; }
  double tau_seconds() const { return tau_s_; }
  Duration shift() const { return shift_; }
  double horizon_quantile() const { return q_; }
  Duration uniform_lower() const { return a_; }
  Duration uniform_upper() const { return b_; }
  Duration first_edge() const { return first_edge_; }
  Duration bin_width() const { return bin_width_; }
  const std::vector<double>& counts() const { return counts_; }

  bool operator==(const DelayKernel&) const = default;

 private:
  DelayKernel() = default;
  // Computes lower_, horizon_ and cdf_at_horizon_; false if unusable.
  bool Finish(std::string* error);

  Kind kind_ = Kind::kUniform;
  Duration a_, b_;                 // uniform support [a, b)
  double shape_ = 0;               // gamma shape
  double scale_s_ = 0;             // gamma scale, seconds
  double rate_ = 0;                // exponential rate, per second
  double mu_ = 0, sigma_ = 0;      // lognormal (log s) / ex-Gaussian (s)
  double tau_s_ = 0;               // ex-Gaussian exponential mean, seconds
  double exg_below_zero_ = 0;      // ex-Gaussian G(0), cut off
  Duration shift_;                 // gamma / exponential / lognormal shift
  double q_ = 1.0;                 // horizon quantile (unbounded kinds)
  Duration first_edge_, bin_width_;  // empirical histogram geometry
  std::vector<double> counts_;     // empirical counts, as given
  std::vector<double> cum_;        // empirical CDF at each bin edge
  Duration lower_, horizon_;       // support used for credit
  double cdf_at_horizon_ = 1.0;    // normaliser of the cut CDF
};

// Credit of step [start, end) from feedback at t_f (docs/architecture.md §5):
// CutCdf(t_f - start) - CutCdf(t_f - end), never negative. The credit
// engine computes exactly this expression, so results agree bit for bit.
double Credit(const DelayKernel& kernel, SessionTime t_f, SessionTime start,
              SessionTime end);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_DELAY_KERNEL_H_

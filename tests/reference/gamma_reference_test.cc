// The gamma kernel's CDF and the Minka fit against values from outside the
// project; each check names its source on the line.
#include <cmath>
#include <vector>

#include <boost/math/special_functions/gamma.hpp>
#include <gtest/gtest.h>

#include "server/core/delay_kernel.h"
#include "server/core/gamma_fit.h"

namespace tickmark {
namespace {

// P(a, x) through a kernel with unit scale and no shift.
double KernelP(double a, double x) {
  auto k = DelayKernel::Gamma(a, 1.0, Duration::Zero());
  EXPECT_TRUE(k.has_value());
  return k->Cdf(Duration::FromSeconds(x));
}

TEST(GammaReferenceTest, RegularisedLowerIncompleteGamma) {
  struct Case { double a, x, p; };
  const Case cases[] = {
      {1, 1, 0.63212055882855768},     // Boost.Math gamma_p
      {2, 1, 0.26424111765711536},     // Boost.Math gamma_p
      {0.5, 0.5, 0.68268949213708590}, // Boost.Math gamma_p
      {5, 5, 0.55950671493478759},     // Boost.Math gamma_p
      {100, 90, 0.15822098918643017},  // Boost.Math gamma_p
  };
  for (const Case& c : cases) {
    EXPECT_NEAR(boost::math::gamma_p(c.a, c.x), c.p, 2e-16 * 4);  // Boost.Math gamma_p (the reference itself)
    EXPECT_NEAR(KernelP(c.a, c.x), c.p, 1e-14 * c.p) << c.a << " " << c.x;  // Boost.Math gamma_p
  }
}

TEST(GammaReferenceTest, ChiSquareNinetyFifthPercentiles) {
  // Chi-square with k degrees of freedom is gamma(k/2, scale 2).
  struct Case { double k, x; };
  const Case cases[] = {
      {1, 3.841459},   // Abramowitz & Stegun ch. 26
      {2, 5.991465},   // Abramowitz & Stegun ch. 26
      {10, 18.307038}, // Abramowitz & Stegun ch. 26
  };
  for (const Case& c : cases) {
    auto k = DelayKernel::Gamma(c.k / 2, 2.0, Duration::Zero());
    ASSERT_TRUE(k.has_value());
    EXPECT_NEAR(k->Cdf(Duration::FromSeconds(c.x)), 0.95, 1e-7) << c.k;  // A&S ch. 26, table to 6 decimals
    EXPECT_NEAR(k->Quantile(0.95).seconds(), c.x, 1e-6) << c.k;          // A&S ch. 26
  }
}

TEST(GammaReferenceTest, MinkaMaximumLikelihoodVectors) {
  struct Case { std::vector<double> x; double shape, scale; };
  const Case cases[] = {
      {{1, 2, 3, 4, 5}, 3.70164381000882, 0.810450749444976},  // Minka 2002, derived in 30-digit arithmetic
      {{0.3, 0.45, 0.5, 0.62, 0.8, 1.1, 0.38, 0.55},
       6.69944065935308, 0.0876938881725584},  // Minka 2002, derived in 30-digit arithmetic
      {{0.25, 0.31, 0.42, 0.47, 0.52, 0.58, 0.66, 0.74, 0.91, 1.30},
       4.78086786458137, 0.128846899234254},  // Minka 2002, derived in 30-digit arithmetic
  };
  for (const Case& c : cases) {
    auto fit = FitGamma(c.x);
    ASSERT_TRUE(fit.has_value());
    EXPECT_NEAR(fit->shape, c.shape, 1e-12 * c.shape);
    EXPECT_NEAR(fit->scale_seconds, c.scale, 1e-12 * c.scale);
    EXPECT_LE(fit->iterations, 10);  // Minka 2002: converges in a few steps
    // The fitted kernel keeps the maximum-likelihood mean: shape × scale is
    // the sample mean (Minka 2002, scale = mean / a).
    double mean = 0;
    for (double v : c.x) mean += v;
    mean /= static_cast<double>(c.x.size());
    EXPECT_NEAR(fit->shape * fit->scale_seconds, mean, 1e-14);
  }
}

TEST(GammaReferenceTest, FitRefusesDegenerateSamples) {
  EXPECT_FALSE(FitGamma(std::vector<double>{}).has_value());
  EXPECT_FALSE(FitGamma(std::vector<double>{0.5}).has_value());
  EXPECT_FALSE(FitGamma(std::vector<double>{0.5, 0.5, 0.5}).has_value());  // s = 0: no maximum (Minka 2002)
  EXPECT_FALSE(FitGamma(std::vector<double>{0.5, 0.0}).has_value());
  EXPECT_FALSE(FitGamma(std::vector<double>{0.5, -1}).has_value());
  EXPECT_FALSE(FitGamma(std::vector<double>{0.5, NAN}).has_value());
}

}  // namespace
}  // namespace tickmark

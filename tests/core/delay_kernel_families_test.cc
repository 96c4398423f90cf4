// The lognormal and ex-Gaussian delay kernels: CDFs against Boost.Math,
// the zero cut and horizon, the text form, and credit over a partition.
#include <gtest/gtest.h>

#include <boost/math/distributions/lognormal.hpp>
#include <boost/math/distributions/normal.hpp>
#include <cmath>
#include <string>
#include <vector>

#include "server/core/delay_kernel.h"
#include "server/core/ex_gaussian.h"

namespace tickmark {
namespace {

Duration Secs(double s) { return Duration::FromSeconds(s); }

TEST(DelayKernelFamiliesTest, LognormalCdfMatchesBoostOverGrid) {
  for (double mu : {-1.2, -0.5, 0.0, 0.7}) {
    for (double sigma : {0.1, 0.35, 1.0}) {
      for (double shift : {0.0, 0.12}) {
        auto k = DelayKernel::Lognormal(mu, sigma, Secs(shift));
        ASSERT_TRUE(k.has_value());
        boost::math::lognormal_distribution<double> ref(mu, sigma);
        for (double x : {0.01, 0.1, 0.3, 0.6, 1.0, 2.5, 8.0}) {
          const double expect = boost::math::cdf(ref, x);
          EXPECT_NEAR(k->Cdf(Secs(shift + x)), expect, 1e-13 + 1e-12 * expect)
              << mu << " " << sigma << " " << shift << " "
              << x;  // Boost.Math lognormal_distribution cdf
        }
        EXPECT_EQ(k->Cdf(Secs(shift)), 0.0);
        EXPECT_EQ(k->LowerBound(), Secs(shift));
        const double h =
            boost::math::quantile(ref, 0.999);  // Boost.Math lognormal_distribution quantile
        EXPECT_LE(std::abs((k->Horizon() - Secs(shift)).seconds() - h), 1.5e-9);
        EXPECT_NEAR(k->CdfAtHorizon(), 0.999, 1e-7);
        EXPECT_NEAR(k->Quantile(0.5).seconds(), shift + std::exp(mu), 1e-9);  // median e^mu
      }
    }
  }
}

TEST(DelayKernelFamiliesTest, ExGaussianIsTheZeroCutDistribution) {
  // A fit with real mass below zero: mu 0.1 s, sigma 0.1 s.
  auto k = DelayKernel::ExGaussian(0.1, 0.1, 0.3);
  ASSERT_TRUE(k.has_value());
  const double g0 = ExGaussianCdf(0, 0.1, 0.1, 0.3);
  ASSERT_GT(g0, 0.02);  // about 2.4% of the mass is cut
  EXPECT_EQ(k->LowerBound(), Duration::Zero());
  EXPECT_EQ(k->Cdf(Duration::Zero()), 0.0);
  EXPECT_EQ(k->Cdf(Secs(-1)), 0.0);
  for (double x : {0.01, 0.2, 0.5, 1.0, 2.0}) {
    EXPECT_NEAR(k->Cdf(Secs(x)), (ExGaussianCdf(x, 0.1, 0.1, 0.3) - g0) / (1 - g0), 1e-15);
  }
  EXPECT_NEAR(k->CdfAtHorizon(), 0.999, 1e-9);
  EXPECT_EQ(k->CutCdf(k->Horizon()), 1.0);
  EXPECT_EQ(k->CutCdf(Duration::Zero()), 0.0);
  for (double p : {0.1, 0.5, 0.9}) {
    EXPECT_NEAR(k->Cdf(k->Quantile(p)), p, 1e-8) << p;
  }
}

TEST(DelayKernelFamiliesTest, ExGaussianRefusesMostMassBelowZero) {
  std::string error;
  EXPECT_FALSE(DelayKernel::ExGaussian(-0.5, 0.1, 0.2, 0.999, &error).has_value());
  EXPECT_NE(error.find("below zero"), std::string::npos) << error;
  EXPECT_FALSE(DelayKernel::ExGaussian(0.4, 0, 0.2).has_value());
  EXPECT_FALSE(DelayKernel::ExGaussian(0.4, 0.05, -0.2).has_value());
  EXPECT_FALSE(DelayKernel::ExGaussian(NAN, 0.05, 0.2).has_value());
  EXPECT_FALSE(DelayKernel::Lognormal(-0.5, 0, Duration::Zero()).has_value());
  EXPECT_FALSE(DelayKernel::Lognormal(INFINITY, 0.3, Duration::Zero()).has_value());
  EXPECT_FALSE(DelayKernel::Lognormal(-0.5, 0.3, Secs(-0.1)).has_value());
  EXPECT_FALSE(DelayKernel::Lognormal(12, 3, Duration::Zero()).has_value());  // horizon > 1 day
}

TEST(DelayKernelFamiliesTest, ExGaussianCdfLimitsAndBranchContinuity) {
  // tau -> 0: the exponential part vanishes, leaving normal(mu, sigma).
  boost::math::normal_distribution<double> normal(0.5, 0.1);
  for (double x : {0.3, 0.45, 0.5, 0.6, 0.8}) {
    EXPECT_NEAR(ExGaussianCdf(x, 0.5, 0.1, 1e-7), boost::math::cdf(normal, x),
                1e-6);  // Boost.Math normal_distribution cdf
  }
  // sigma -> 0: a shifted exponential, 1 - exp(-(x - mu)/tau).
  for (double x : {0.6, 1.0, 2.0}) {
    EXPECT_NEAR(ExGaussianCdf(x, 0.5, 1e-6, 0.3), -std::expm1(-(x - 0.5) / 0.3), 1e-5);
  }
  // The two ways of taking the exponential tail meet at u - sigma/tau = -5.
  const double mu = 0.4, sigma = 0.05, tau = 0.01;  // sigma/tau = 5
  const double x = mu;                              // u = 0: b = -5
  const double below = ExGaussianCdf(std::nextafter(x, 0.0), mu, sigma, tau);
  const double above = ExGaussianCdf(std::nextafter(x, 1.0), mu, sigma, tau);
  EXPECT_NEAR(below, above, 1e-14);
  // The density is the CDF's slope, far into both tails too.
  for (double xx : {-0.2, 0.2, 0.4, 0.5, 1.0, 3.0}) {
    const double h = 1e-6;
    const double slope =
        (ExGaussianCdf(xx + h, 0.4, 0.05, 0.3) - ExGaussianCdf(xx - h, 0.4, 0.05, 0.3)) / (2 * h);
    const double pdf = std::exp(ExGaussianLogPdf(xx, 0.4, 0.05, 0.3));
    EXPECT_NEAR(slope, pdf, 1e-6 + 1e-6 * pdf) << xx;
  }
  // Far tails stay finite and ordered.
  EXPECT_TRUE(std::isfinite(ExGaussianLogPdf(-50, 0.4, 0.05, 0.3)));
  EXPECT_TRUE(std::isfinite(ExGaussianLogPdf(500, 0.4, 0.05, 0.3)));
  EXPECT_EQ(ExGaussianCdf(-50, 0.4, 0.05, 0.3), 0.0);
  EXPECT_EQ(ExGaussianCdf(500, 0.4, 0.05, 0.3), 1.0);
}

TEST(DelayKernelFamiliesTest, TextFormRoundTrips) {
  struct TextCase {
    const char* text;
    DelayKernel::Kind kind;
  };
  const TextCase cases[] = {
      {"lognormal:-0.5,0.35", DelayKernel::Kind::kLognormal},
      {"lognormal:-0.5,0.35,0.12", DelayKernel::Kind::kLognormal},
      {"lognormal: -0.5 , 0.35 , 0.12 , q=0.99", DelayKernel::Kind::kLognormal},
      {"exgauss:0.45,0.06,0.25", DelayKernel::Kind::kExGaussian},
      {"exgauss:0.45,0.06,0.25,q=0.995", DelayKernel::Kind::kExGaussian},
      {"exgauss(mu=0.45s,sigma=0.06s,tau=0.25s,q=0.999)", DelayKernel::Kind::kExGaussian},
      {"lognormal(mu=-0.5,sigma=0.35,shift=0.12s,q=0.999)", DelayKernel::Kind::kLognormal},
  };
  for (const TextCase& c : cases) {
    std::string error;
    auto k = DelayKernel::Parse(c.text, &error);
    ASSERT_TRUE(k.has_value()) << c.text << ": " << error;
    EXPECT_EQ(k->kind(), c.kind);
    auto again = DelayKernel::Parse(k->Describe(), &error);
    ASSERT_TRUE(again.has_value()) << k->Describe() << ": " << error;
    EXPECT_EQ(*again, *k) << k->Describe();
  }
  auto l = *DelayKernel::Parse("lognormal:-0.5,0.35,0.12");
  EXPECT_EQ(l.Describe(), "lognormal(mu=-0.5,sigma=0.35,shift=0.12s,q=0.999)");
  EXPECT_EQ(l.mu(), -0.5);
  EXPECT_EQ(l.sigma(), 0.35);
  EXPECT_EQ(l.shift(), Duration::Millis(120));
  auto e = *DelayKernel::Parse("exgauss:0.45,0.06,0.25");
  EXPECT_EQ(e.Describe(), "exgauss(mu=0.45s,sigma=0.06s,tau=0.25s,q=0.999)");
  EXPECT_EQ(e.tau_seconds(), 0.25);
}

TEST(DelayKernelFamiliesTest, ParseRejectsBadText) {
  for (const char* text :
       {"lognormal:-0.5", "lognormal:-0.5,0", "lognormal:-0.5,0.3,0.1,0.2",
        "lognormal:-0.5,0.3,tau=0.2", "exgauss:0.45,0.06", "exgauss:0.45,0.06,0.25,0.1",
        "exgauss:0.45,0.06,0.25,shift=0.1", "exgauss:0.45,0.06,0.25,q=1", "exgauss:-3,0.06,0.25",
        "exgauss:0.45,x,0.25"}) {
    std::string error;
    EXPECT_FALSE(DelayKernel::Parse(text, &error).has_value()) << text;
    EXPECT_FALSE(error.empty()) << text;
  }
}

TEST(DelayKernelFamiliesTest, CreditOverAPartitionSumsToOne) {
  for (const char* text :
       {"lognormal:-0.5,0.35,0.1", "exgauss:0.45,0.06,0.25", "exgauss:0.1,0.1,0.3"}) {
    const DelayKernel k = *DelayKernel::Parse(text);
    const SessionTime tf = SessionTime::FromNanos(1'000'000'000'000);
    // Irregular steps covering [tf - horizon - 1 s, tf].
    double total = 0;
    SessionTime s = tf - k.Horizon() - Duration::Seconds(1);
    for (int i = 0; s < tf; ++i) {
      const SessionTime e = std::min(tf, s + Duration::Millis(37 + (i * 53) % 211));
      const double c = Credit(k, tf, s, e);
      EXPECT_GE(c, 0.0);
      total += c;
      s = e;
    }
    EXPECT_NEAR(total, 1.0, 1e-12) << text;
  }
}

}  // namespace
}  // namespace tickmark

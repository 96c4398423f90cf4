// DelayKernel against the reference library Boost.Math (distributions'
// cdf/quantile, computed with Boost's default, promoted precision) and the
// arithmetic of a histogram.
#include "server/core/delay_kernel.h"

#include <cmath>
#include <string>
#include <vector>

#include <boost/math/distributions/exponential.hpp>
#include <boost/math/distributions/gamma.hpp>
#include <boost/math/distributions/uniform.hpp>
#include <gtest/gtest.h>

namespace tickmark::delay_kernel_test {
namespace {

Duration Secs(double s) { return Duration::FromSeconds(s); }

TEST(DelayKernelTest, GammaCdfMatchesBoostOverGrid) {
  for (double shape : {0.5, 1.0, 2.0, 3.7, 10.0}) {
    for (double scale : {0.05, 0.28, 1.0}) {
      for (double shift : {0.0, 0.15}) {
        auto k = DelayKernel::Gamma(shape, scale, Secs(shift));
        ASSERT_TRUE(k.has_value());
        boost::math::gamma_distribution<double> ref(shape, scale);
        for (double x : {0.001, 0.01, 0.1, 0.25, 0.5, 1.0, 2.0, 5.0}) {
          const double expect = boost::math::cdf(ref, x);
          EXPECT_NEAR(k->Cdf(Secs(shift + x)), expect, 1e-13 + 1e-13 * expect)
              << shape << " " << scale << " " << shift << " " << x;  // Boost.Math gamma_distribution cdf
        }
        EXPECT_EQ(k->Cdf(Secs(shift)), 0.0);           // support starts at shift
        EXPECT_EQ(k->Cdf(Secs(shift) - Duration::Nanos(1)), 0.0);
        const double h = boost::math::quantile(ref, 0.999);  // Boost.Math gamma_distribution quantile
        EXPECT_LE(std::abs((k->Horizon() - Secs(shift)).seconds() - h), 1.5e-9);
        EXPECT_NEAR(k->CdfAtHorizon(), 0.999, 1e-8);  // Boost.Math gamma_distribution cdf at quantile
      }
    }
  }
}

TEST(DelayKernelTest, ExponentialCdfMatchesBoost) {
  for (double rate : {0.5, 2.0, 8.0}) {
    for (double shift : {0.0, 0.2}) {
      auto k = DelayKernel::Exponential(rate, Secs(shift));
      ASSERT_TRUE(k.has_value());
      boost::math::exponential_distribution<double> ref(rate);
      for (double x : {0.001, 0.1, 0.5, 1.0, 3.0}) {
        EXPECT_NEAR(k->Cdf(Secs(shift + x)), boost::math::cdf(ref, x), 1e-14);  // Boost.Math exponential_distribution cdf
      }
      EXPECT_LE(std::abs((k->Horizon() - Secs(shift)).seconds() -
                         boost::math::quantile(ref, 0.999)),
                1e-9);  // Boost.Math exponential_distribution quantile
    }
  }
}

TEST(DelayKernelTest, UniformCdfMatchesBoost) {
  auto k = DelayKernel::Uniform(Secs(0.2), Secs(4.0));
  ASSERT_TRUE(k.has_value());
  boost::math::uniform_distribution<double> ref(0.2, 4.0);
  for (double x : {0.2, 0.3, 1.0, 2.5, 3.99, 4.0}) {
    EXPECT_NEAR(k->Cdf(Secs(x)), boost::math::cdf(ref, x), 1e-15);  // Boost.Math uniform_distribution cdf
  }
  EXPECT_EQ(k->Cdf(Secs(0.1)), 0.0);
  EXPECT_EQ(k->Cdf(Secs(5.0)), 1.0);
  EXPECT_EQ(k->LowerBound(), Secs(0.2));
  EXPECT_EQ(k->Horizon(), Secs(4.0));  // bounded: upper end of support
  EXPECT_EQ(k->CdfAtHorizon(), 1.0);
}

TEST(DelayKernelTest, CutCdfIsRenormalisedAndExactAtEnds) {
  auto k = DelayKernel::Gamma(2.0, 0.28, Duration::Zero());
  ASSERT_TRUE(k.has_value());
  EXPECT_EQ(k->CutCdf(Duration::Zero()), 0.0);
  EXPECT_EQ(k->CutCdf(-Secs(1)), 0.0);
  EXPECT_EQ(k->CutCdf(k->Horizon()), 1.0);
  EXPECT_EQ(k->CutCdf(k->Horizon() + Secs(10)), 1.0);
  double previous = 0;
  for (int ms = 1; ms < 2600; ms += 7) {
    const Duration d = Duration::Millis(ms);
    const double cut = k->CutCdf(d);
    if (d < k->Horizon()) {
      EXPECT_DOUBLE_EQ(cut, k->Cdf(d) / k->CdfAtHorizon());  // definition (docs/architecture.md §5)
    }
    EXPECT_GE(cut, previous);  // a CDF never decreases
    previous = cut;
  }
}

// Regression (found by fuzz/delay_kernel_fuzz.cc): for gamma:.003036,0100002
// the CDF one nanosecond below the horizon came out an ulp above its value at
// the horizon, so the cut CDF exceeded 1 and a credit could exceed the whole
// feedback.
TEST(DelayKernelTest, CutCdfNeverExceedsOneBelowTheHorizon) {
  auto k = DelayKernel::Parse("gamma:.003036,0100002");
  ASSERT_TRUE(k.has_value());
  for (int64_t back : {1, 2, 10, 1000, 1'000'000}) {
    const Duration d = k->Horizon() - Duration::Nanos(back);
    EXPECT_LE(k->CutCdf(d), 1.0) << back << " ns below the horizon";
    EXPECT_GE(k->CutCdf(d), 0.0);
  }
}

TEST(DelayKernelTest, EmpiricalIsPiecewiseLinearThroughBinEdges) {
  // Bins [0.1,0.2) [0.2,0.3) [0.3,0.4) [0.4,0.5) with counts 0,1,2,1.
  auto k = DelayKernel::Empirical(Secs(0.1), Secs(0.1), {0, 1, 2, 1});
  ASSERT_TRUE(k.has_value());
  // Cumulative counts / total at the edges (histogram arithmetic, derived).
  EXPECT_EQ(k->Cdf(Secs(0.2)), 0.0);
  EXPECT_DOUBLE_EQ(k->Cdf(Secs(0.3)), 0.25);
  EXPECT_DOUBLE_EQ(k->Cdf(Secs(0.35)), 0.5);
  EXPECT_DOUBLE_EQ(k->Cdf(Secs(0.4)), 0.75);
  EXPECT_DOUBLE_EQ(k->Cdf(Secs(0.45)), 0.875);
  EXPECT_EQ(k->Cdf(Secs(0.5)), 1.0);
  EXPECT_EQ(k->LowerBound(), Secs(0.2));  // first non-empty bin
  EXPECT_EQ(k->Horizon(), Secs(0.5));
  EXPECT_EQ(k->Quantile(0.5), Secs(0.35));
  EXPECT_EQ(k->Quantile(0.875), Secs(0.45));
}

TEST(DelayKernelTest, QuantileInvertsCdf) {
  for (const char* text : {"gamma:2,0.28", "gamma:0.7,0.5,0.1", "exponential:3,0.05",
                           "uniform:0.2,4"}) {
    auto k = DelayKernel::Parse(text);
    ASSERT_TRUE(k.has_value()) << text;
    for (double p : {0.05, 0.5, 0.9, 0.99}) {
      EXPECT_NEAR(k->Cdf(k->Quantile(p)), p, 1e-7) << text;  // definition of a quantile
    }
  }
}

TEST(DelayKernelTest, DescribeIsStableAndParsesBack) {
  auto g = DelayKernel::Gamma(2.0, 0.28, Duration::Zero());
  ASSERT_TRUE(g.has_value());
  EXPECT_EQ(g->Describe(), "gamma(shape=2,scale=0.28s,shift=0s,q=0.999)");
  EXPECT_EQ(DelayKernel::Uniform(Secs(0.2), Secs(4))->Describe(),
            "uniform(lower=0.2s,upper=4s)");
  EXPECT_EQ(DelayKernel::Exponential(2.5, Duration::Millis(100), 0.99)->Describe(),
            "exponential(rate=2.5/s,shift=0.1s,q=0.99)");
  EXPECT_EQ(DelayKernel::Empirical(Duration::Millis(150), Duration::Millis(50),
                                   {1, 2.5, 0})->Describe(),
            "empirical(first_edge=0.15s,bin_width=0.05s,counts=[1,2.5,0])");
  for (const char* text :
       {"uniform:0.2,4.0", "gamma:2,0.28", "gamma:3.70164381000882,0.810450749444976,0.123456789",
        "exponential:2.5", "exponential:2.5,0.1,q=0.99", "gamma: 2 , 0.28 , 0.05 , q=0.95",
        "empirical:0.1,0.05,1,2,3,0,1"}) {
    std::string error;
    auto k = DelayKernel::Parse(text, &error);
    ASSERT_TRUE(k.has_value()) << text << ": " << error;
    auto again = DelayKernel::Parse(k->Describe(), &error);
    ASSERT_TRUE(again.has_value()) << k->Describe() << ": " << error;
    EXPECT_EQ(*again, *k) << k->Describe();
    EXPECT_EQ(again->Describe(), k->Describe());
  }
}

TEST(DelayKernelTest, ShortFormsMeanSeconds) {
  auto u = DelayKernel::Parse("uniform:0.2,4.0");
  ASSERT_TRUE(u.has_value());
  EXPECT_EQ(u->kind(), DelayKernel::Kind::kUniform);
  EXPECT_EQ(u->uniform_lower(), Duration::Millis(200));
  EXPECT_EQ(u->uniform_upper(), Duration::Millis(4000));
  auto g = DelayKernel::Parse("gamma:2,0.28,0.1");
  ASSERT_TRUE(g.has_value());
  EXPECT_EQ(g->shape(), 2.0);
  EXPECT_EQ(g->scale_seconds(), 0.28);
  EXPECT_EQ(g->shift(), Duration::Millis(100));
  EXPECT_EQ(g->horizon_quantile(), DelayKernel::kDefaultHorizonQuantile);
  auto e = DelayKernel::Parse("exponential:4,0.15");
  ASSERT_TRUE(e.has_value());
  EXPECT_EQ(e->rate_per_second(), 4.0);
  EXPECT_EQ(e->shift(), Duration::Millis(150));
}

TEST(DelayKernelTest, RejectsInvalidParameters) {
  for (const char* text :
       {"", "gamma", "foo:1,2", "uniform:0.2", "uniform:4,0.2", "uniform:0.2,0.2",
        "uniform:-0.1,1", "gamma:-1,0.28", "gamma:2,0", "gamma:nan,0.28",
        "gamma:inf,0.28", "gamma:2,0.28,-0.1", "gamma:2,0.28,q=1", "gamma:2,0.28,q=0",
        "gamma:2,0.28,0,1", "gamma:2,1e9", "exponential:0", "exponential:-2",
        "exponential:1e-9", "empirical:0,0.1", "empirical:0,0.1,0,0",
        "empirical:0,0,1", "empirical:0,0.1,1,-1", "gamma(shape=2)",
        "gamma(shape=2,scale=0.28s", "uniform(lower=0.2s,upper=4s,q=0.9)",
        "gamma:q=0.9,2,0.28", "uniform:0.2,4,x"}) {
    std::string error;
    EXPECT_FALSE(DelayKernel::Parse(text, &error).has_value()) << text;
    EXPECT_FALSE(error.empty()) << text;
  }
  EXPECT_FALSE(DelayKernel::Uniform(Secs(1), Secs(100000)).has_value());
  EXPECT_FALSE(DelayKernel::Gamma(2, 0.28, Duration::Zero(), 1.0).has_value());
}

TEST(DelayKernelTest, CreditIsDifferenceOfCutCdf) {
  auto k = DelayKernel::Gamma(2.0, 0.28, Duration::Zero());
  ASSERT_TRUE(k.has_value());
  const SessionTime t0 = SessionTime::FromNanos(1'700'000'000'000'000'000);
  const SessionTime t_f = t0 + Secs(1.0);
  EXPECT_EQ(Credit(*k, t_f, t0 + Secs(0.2), t0 + Secs(0.6)),
            k->CutCdf(Secs(0.8)) - k->CutCdf(Secs(0.4)));  // docs/architecture.md §5
  EXPECT_EQ(Credit(*k, t_f, t_f, t_f + Secs(1)), 0.0);  // starts at the feedback
  EXPECT_EQ(Credit(*k, t_f, t_f - Secs(10), t_f - Secs(9)), 0.0);  // beyond horizon
}

}  // namespace
}  // namespace tickmark::delay_kernel_test

// Lognormal and ex-Gaussian kernels and the calibration fits against the
// reference libraries Boost.Math and SciPy (Debian's python3-scipy, run at
// test time through Debian's own interpreter /usr/bin/python3 — another
// python3 first on PATH may not see Debian's packages).
//
// Each SciPy check runs a short script on the very numbers the C++ side used
// and compares what it prints. Tolerances:
//   CDFs and log-densities   1e-13 absolute + 1e-9 relative (both sides are
//                            closed forms in double precision)
//   gamma shape and scale    1e-6 relative (SciPy solves the ML shape
//                            equation with floc=0 by root finding)
//   lognormal mu and sigma   1e-10 (closed form on both sides, floc=0)
//   ex-Gaussian              SciPy's exponnorm.fit is a general Nelder-Mead
//                            (optimize.fmin, xtol 1e-4): our maximum must be
//                            at least as high (-1e-6) as SciPy's, both
//                            evaluated by SciPy, and the parameters within
//                            2% of the data's standard deviation
//                            (with sigma >= 1 ms, our floor: when SciPy's
//                            maximum lies below it, SciPy's fit with
//                            fscale=1e-3 is the reference)
//   shifted gamma            SciPy's gamma.fit with a free loc may put loc
//                            below zero (our shift is >= 0) or run into the
//                            unbounded shape < 1 edge; the reference is
//                            instead SciPy's bounded scalar minimiser over
//                            loc in [0, our bound] of gamma.fit(floc=loc):
//                            our maximum must be at least as high (-1e-6).
// Our own log-likelihoods (the two-lognormal mixture's too; SciPy has no
// mixture fit to compare the maximum with) must equal SciPy's logpdf sums
// at our parameters (1e-9 relative).
#include <gtest/gtest.h>
#include <unistd.h>

#include <algorithm>
#include <boost/math/distributions/lognormal.hpp>
#include <cmath>
#include <cstdio>
#include <fstream>
#include <optional>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "server/core/delay_fit.h"
#include "server/core/delay_kernel.h"
#include "server/core/ex_gaussian.h"
#include "server/core/gamma_fit.h"

namespace tickmark {
namespace {

constexpr const char* kPython = "/usr/bin/python3";

std::string List(const std::vector<double>& v) {
  std::string out = "[";
  char buf[40];
  for (double x : v) {
    std::snprintf(buf, sizeof(buf), "%.17g,", x);
    out += buf;
  }
  return out + "]";
}

// Runs `body` after the SciPy imports; returns the numbers it printed, or
// fails the test with the interpreter's output.
std::vector<double> SciPy(const std::string& body) {
  static int counter = 0;
  const std::string path = testing::TempDir() + "/scipy_ref_" + std::to_string(getpid()) + "_" +
                           std::to_string(++counter) + ".py";
  {
    std::ofstream f(path);
    f << "import math\nimport numpy as np\nfrom scipy import stats\n"
         "def out(*vs):\n    print(' '.join(repr(float(v)) for v in vs))\n"
      << body << "\n";
  }
  const std::string command = std::string(kPython) + " " + path + " 2>&1";
  FILE* p = popen(command.c_str(), "r");
  std::string text;
  if (p != nullptr) {
    char buf[4096];
    size_t got;
    while ((got = fread(buf, 1, sizeof(buf), p)) > 0) text.append(buf, got);
  }
  const int status = p != nullptr ? pclose(p) : -1;
  std::remove(path.c_str());
  std::vector<double> values;
  std::istringstream in(text);
  std::string token;
  bool parsed = true;
  while (in >> token) {
    char* end = nullptr;
    const double v = std::strtod(token.c_str(), &end);
    if (end != token.c_str() + token.size()) parsed = false;
    values.push_back(v);
  }
  if (status != 0 || !parsed) {
    ADD_FAILURE() << "SciPy reference failed (Debian's python3-scipy is needed; ./run "
                     "installs it): "
                  << text;
    return {};
  }
  return values;
}

// Points in seconds, each a whole number of nanoseconds, as the kernels
// take them.
std::vector<double> Grid(double lo, double hi, int n) {
  std::vector<double> g;
  for (int i = 0; i < n; ++i)
    g.push_back(Duration::FromSeconds(lo + (hi - lo) * i / (n - 1)).seconds());
  return g;
}

TEST(DelayFitReferenceTest, LognormalCdfAgainstBoostAndSciPy) {
  struct P {
    double mu, sigma, shift;
  };
  const P params[] = {{-0.6, 0.5, 0.0}, {-1.5, 0.2, 0.1}, {0.3, 1.1, 0.05}};
  std::string script;
  std::vector<std::vector<double>> grids;
  for (const P& p : params) {
    grids.push_back(Grid(p.shift + 0.001, p.shift + 6, 60));
    char args[160];
    std::snprintf(args, sizeof(args), "%.17g, loc=%.17g, scale=math.exp(%.17g)", p.sigma, p.shift,
                  p.mu);
    script += "for x in " + List(grids.back()) + ":\n    out(stats.lognorm.cdf(x, " + args + "))\n";
  }
  const std::vector<double> ref = SciPy(script);
  ASSERT_EQ(ref.size(), 60u * 3);
  for (size_t j = 0; j < 3; ++j) {
    const P& p = params[j];
    auto k = DelayKernel::Lognormal(p.mu, p.sigma, Duration::FromSeconds(p.shift));
    ASSERT_TRUE(k.has_value());
    boost::math::lognormal_distribution<double> boost_ref(p.mu, p.sigma);
    for (size_t i = 0; i < grids[j].size(); ++i) {
      const double x = grids[j][i];
      const double want = ref[60 * j + i];
      const double got = k->Cdf(Duration::FromSeconds(x));
      EXPECT_NEAR(got, want, 1e-13 + 1e-9 * want)
          << x;  // SciPy stats.lognorm.cdf (s=sigma, loc=shift, scale=e^mu)
      EXPECT_NEAR(
          got,
          boost::math::cdf(boost_ref,
                           (Duration::FromSeconds(x) - Duration::FromSeconds(p.shift)).seconds()),
          1e-13 + 1e-12 * got);  // Boost.Math lognormal_distribution cdf
    }
  }
}

struct ExG {
  double mu, sigma, tau;
};
const ExG kExGaussians[] = {
    {0.45, 0.06, 0.25},   // a typical human delay
    {0.30, 0.10, 0.01},   // nearly normal: sigma/tau = 10
    {0.50, 0.005, 0.40},  // nearly a shifted exponential
    {1.20, 0.30, 0.90},
};

std::string ExGArgs(const ExG& p) {
  char buf[160];
  std::snprintf(buf, sizeof(buf), "K=%.17g, loc=%.17g, scale=%.17g", p.tau / p.sigma, p.mu,
                p.sigma);
  return buf;
}

TEST(DelayFitReferenceTest, ExGaussianCdfAndDensityAgainstSciPy) {
  constexpr int kPoints = 80;
  std::string script;
  std::vector<std::vector<double>> grids;
  for (const ExG& p : kExGaussians) {
    // From far below mu into the far exponential tail.
    grids.push_back(Grid(p.mu - 10 * p.sigma, p.mu + 25 * p.tau, kPoints));
    script += "for x in " + List(grids.back()) + ":\n    out(stats.exponnorm.cdf(x, " + ExGArgs(p) +
              "), stats.exponnorm.logpdf(x, " + ExGArgs(p) + "))\n";
  }
  const std::vector<double> ref = SciPy(script);
  ASSERT_EQ(ref.size(), 2u * kPoints * grids.size());
  for (size_t j = 0; j < grids.size(); ++j) {
    const ExG& p = kExGaussians[j];
    SCOPED_TRACE(ExGArgs(p));
    for (size_t i = 0; i < grids[j].size(); ++i) {
      const double x = grids[j][i];
      const double cdf = ref[2 * (kPoints * j + i)], logpdf = ref[2 * (kPoints * j + i) + 1];
      EXPECT_NEAR(ExGaussianCdf(x, p.mu, p.sigma, p.tau), cdf, 1e-13 + 1e-9 * cdf)
          << x;  // SciPy stats.exponnorm.cdf(x, K=tau/sigma, loc=mu, scale=sigma)
      EXPECT_NEAR(ExGaussianLogPdf(x, p.mu, p.sigma, p.tau), logpdf,
                  1e-13 + 1e-9 * std::abs(logpdf))
          << x;  // SciPy stats.exponnorm.logpdf
    }
  }
}

TEST(DelayFitReferenceTest, ExGaussianKernelIsSciPysConditionedOnPositiveDelay) {
  const ExG p{0.1, 0.1, 0.3};  // about 2.4% of the mass below zero
  auto k = DelayKernel::ExGaussian(p.mu, p.sigma, p.tau);
  ASSERT_TRUE(k.has_value());
  const std::vector<double> xs = Grid(0.01, 3, 40);
  const std::vector<double> ref =
      SciPy("g0 = stats.exponnorm.cdf(0, " + ExGArgs(p) + ")\nfor x in " + List(xs) +
            ":\n    out((stats.exponnorm.cdf(x, " + ExGArgs(p) + ") - g0) / (1 - g0))");
  ASSERT_EQ(ref.size(), xs.size());
  for (size_t i = 0; i < xs.size(); ++i) {
    EXPECT_NEAR(k->Cdf(Duration::FromSeconds(xs[i])), ref[i], 1e-12)
        << xs[i];  // SciPy stats.exponnorm.cdf, conditioned on x > 0
  }
}

enum class Truth { kGamma, kLognormal, kExGaussian };

std::vector<double> Sample(Truth truth, int n, uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::gamma_distribution<double> gamma(2.5, 0.2);
  std::lognormal_distribution<double> lognormal(-0.6, 0.5);
  std::normal_distribution<double> normal(0.45, 0.06);
  std::exponential_distribution<double> exponential(1 / 0.25);
  std::vector<double> x(static_cast<size_t>(n));
  for (double& v : x) {
    v = truth == Truth::kGamma       ? gamma(rng)
        : truth == Truth::kLognormal ? lognormal(rng)
                                     : normal(rng) + exponential(rng);
  }
  return x;
}

TEST(DelayFitReferenceTest, FitsAgainstSciPyFit) {
  struct Case {
    Truth truth;
    int n;
    uint64_t seed;
    std::vector<double> x;
    GammaFit gamma;
    ShiftedGammaFit shifted;
    LognormalFit lognormal;
    ExGaussianFit exg;
    LognormalMixtureFit mixture;
  };
  std::vector<Case> cases;
  std::string script =
      "from scipy import optimize\n"
      "def profile(x, loc):\n"
      "    a, _, scale = stats.gamma.fit(x, floc=loc)\n"
      "    return np.sum(stats.gamma.logpdf(x, a, loc=loc, scale=scale))\n";
  for (Truth truth : {Truth::kGamma, Truth::kLognormal, Truth::kExGaussian}) {
    for (int n : {40, 200}) {
      for (uint64_t seed : {1, 2, 3}) {
        Case c{truth, n,  seed, Sample(truth, n, seed * 100 + static_cast<uint64_t>(truth)), {}, {},
               {},    {}, {}};
        auto gamma = FitGamma(c.x);
        auto shifted = FitShiftedGamma(c.x);
        auto lognormal = FitLognormal(c.x);
        auto exg = FitExGaussian(c.x);
        auto mixture = FitLognormalMixture(c.x);
        ASSERT_TRUE(gamma && shifted && lognormal && exg && mixture);
        c.gamma = *gamma, c.shifted = *shifted, c.lognormal = *lognormal, c.exg = *exg;
        c.mixture = *mixture;
        std::vector<double> sorted = c.x;
        std::sort(sorted.begin(), sorted.end());
        // The shift's upper bound, as FitShiftedGamma states it.
        const double max_shift =
            std::max(0.0, sorted[0] - std::max(1e-3, 0.5 * (sorted[1] - sorted[0])));
        char ours[768];
        std::snprintf(ours, sizeof(ours),
                      "ga, gs = %.17g, %.17g\nsa, ss, sl = %.17g, %.17g, %.17g\n"
                      "lm, ls = %.17g, %.17g\nem, es, et = %.17g, %.17g, %.17g\ncmax = %.17g\n"
                      "mw, m1, s1, m2, s2 = %.17g, %.17g, %.17g, %.17g, %.17g\n",
                      gamma->shape, gamma->scale_seconds, shifted->shape, shifted->scale_seconds,
                      shifted->shift_seconds, lognormal->mu, lognormal->sigma, exg->mu_seconds,
                      exg->sigma_seconds, exg->tau_seconds, max_shift, mixture->weight,
                      mixture->mu1, mixture->sigma1, mixture->mu2, mixture->sigma2);
        script += "x = np.array(" + List(c.x) + ")\n" + ours +
                  // 0, 1
                  "a, _, scale = stats.gamma.fit(x, floc=0)\nout(a, scale)\n"
                  // 2, 3
                  "s, _, scale = stats.lognorm.fit(x, floc=0)\nout(math.log(scale), s)\n"
                  // Our sigma floor (1 ms): when SciPy's maximum lies below
                  // it, SciPy's maximum with sigma fixed at the floor.
                  "K, loc, scale = stats.exponnorm.fit(x)\n"
                  "if scale < 1e-3:\n"
                  "    K, loc, scale = stats.exponnorm.fit(x, fscale=1e-3)\n"
                  // 4, 5, 6, 7, 8
                  "out(loc, scale, K * scale)\n"
                  "out(np.sum(stats.exponnorm.logpdf(x, K, loc=loc, scale=scale)))\n"
                  "out(np.sum(stats.exponnorm.logpdf(x, et / es, loc=em, scale=es)))\n"
                  // The shifted gamma's profile over loc in [0, cmax], by
                  // SciPy's bounded scalar minimiser: 9, 10
                  "r = optimize.minimize_scalar(lambda c: -profile(x, c), bounds=(0, cmax), "
                  "method='bounded', options={'xatol': 1e-9})\n"
                  "out(max(-r.fun, profile(x, 0.0), profile(x, cmax)))\n"
                  "out(np.sum(stats.gamma.logpdf(x, sa, loc=sl, scale=ss)))\n"
                  // 11, 12, 13
                  "out(np.sum(stats.gamma.logpdf(x, ga, scale=gs)))\n"
                  "out(np.sum(stats.lognorm.logpdf(x, ls, scale=math.exp(lm))))\n"
                  "out(np.std(x))\n"
                  // 14
                  "out(np.sum(np.log(mw * stats.lognorm.pdf(x, s1, scale=math.exp(m1)) + "
                  "(1 - mw) * stats.lognorm.pdf(x, s2, scale=math.exp(m2)))))\n";
        cases.push_back(std::move(c));
      }
    }
  }
  const std::vector<double> all = SciPy(script);
  ASSERT_EQ(all.size(), 15 * cases.size());
  for (size_t i = 0; i < cases.size(); ++i) {
    const Case& c = cases[i];
    const double* ref = &all[15 * i];
    SCOPED_TRACE("truth " + std::to_string(static_cast<int>(c.truth)) + " n " +
                 std::to_string(c.n) + " seed " + std::to_string(c.seed));
    EXPECT_NEAR(c.gamma.shape, ref[0], 1e-6 * ref[0]);          // SciPy stats.gamma.fit(x, floc=0)
    EXPECT_NEAR(c.gamma.scale_seconds, ref[1], 1e-6 * ref[1]);  // SciPy stats.gamma.fit(x, floc=0)
    EXPECT_NEAR(c.lognormal.mu, ref[2], 1e-10);     // SciPy stats.lognorm.fit(x, floc=0): ln scale
    EXPECT_NEAR(c.lognormal.sigma, ref[3], 1e-10);  // SciPy stats.lognorm.fit(x, floc=0): s
    const double sd = ref[13];
    EXPECT_NEAR(c.exg.mu_seconds, ref[4], 0.02 * sd);     // SciPy stats.exponnorm.fit: loc
    EXPECT_NEAR(c.exg.sigma_seconds, ref[5], 0.02 * sd);  // SciPy stats.exponnorm.fit: scale
    EXPECT_NEAR(c.exg.tau_seconds, ref[6], 0.02 * sd);    // SciPy stats.exponnorm.fit: K * scale
    EXPECT_GE(ref[8],
              ref[7] - 1e-6);  // SciPy stats.exponnorm.logpdf: ours at least SciPy's maximum
    EXPECT_GE(ref[10],
              ref[9] - 1e-6);  // SciPy optimize.minimize_scalar over stats.gamma.fit(floc=loc)
    const double exg_ll =
        ExGaussianLogLikelihood(c.x, c.exg.mu_seconds, c.exg.sigma_seconds, c.exg.tau_seconds);
    const double sg_ll =
        GammaLogLikelihood(c.x, c.shifted.shape, c.shifted.scale_seconds, c.shifted.shift_seconds);
    const double g_ll = GammaLogLikelihood(c.x, c.gamma.shape, c.gamma.scale_seconds, 0);
    const double l_ll = LognormalLogLikelihood(c.x, c.lognormal.mu, c.lognormal.sigma);
    EXPECT_NEAR(exg_ll, ref[8], 1e-9 * std::abs(ref[8]));   // SciPy stats.exponnorm.logpdf sum
    EXPECT_NEAR(sg_ll, ref[10], 1e-9 * std::abs(ref[10]));  // SciPy stats.gamma.logpdf sum
    EXPECT_NEAR(g_ll, ref[11], 1e-9 * std::abs(ref[11]));   // SciPy stats.gamma.logpdf sum
    EXPECT_NEAR(l_ll, ref[12], 1e-9 * std::abs(ref[12]));   // SciPy stats.lognorm.logpdf sum
    EXPECT_NEAR(LognormalMixtureLogLikelihood(c.x, c.mixture), ref[14],
                1e-9 * std::abs(ref[14]));  // SciPy stats.lognorm.pdf, weighted sum of two
  }
}

}  // namespace
}  // namespace tickmark

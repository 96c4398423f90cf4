// The pairing and fit of `tickmark align` (clients/cli/align.h). The fit is
// checked against NumPy/SciPy in tests/python/test_sync.py; here the
// pairing's behaviour on exact data and its refusals.
#include "clients/cli/align.h"

#include <random>

#include "gtest/gtest.h"

namespace tickmark::cli {
namespace {

// A jittered train as tickmark-serial sends it: gaps uniform in [0.75, 1.25] s.
std::vector<double> Train(size_t n, uint64_t seed, double jitter = 0.25) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> u(1 - jitter, 1 + jitter);
  std::vector<double> t;
  double now = 3.0;
  for (size_t i = 0; i < n; ++i) {
    now += u(rng);
    t.push_back(now);
  }
  return t;
}

TEST(AlignTest, RecoversAnExactMapThroughMissingAndExtraPulses) {
  const std::vector<double> s = Train(300, 11);
  // The other recorder: offset 1234.5 s, 80 ppm fast; it missed every 7th
  // pulse and recorded 30 spurious ones.
  const double a = 1234.5, b = 1 + 80e-6;
  std::vector<double> o;
  for (size_t i = 0; i < s.size(); ++i) {
    if (i % 7 != 3) o.push_back(a + b * s[i]);
  }
  std::mt19937_64 rng(5);
  std::uniform_real_distribution<double> anywhere(a, a + 320);
  for (int i = 0; i < 30; ++i) o.push_back(anywhere(rng));
  AlignOptions opt;
  opt.tolerance_s = 0.02;
  auto r = AlignPulses(s, o, opt);
  ASSERT_TRUE(r.ok()) << r.status();
  EXPECT_NEAR(r->a, a, 1e-6);
  EXPECT_NEAR(r->drift_ppm(), 80, 1e-3);
  EXPECT_GE(r->pairs.size(), 300u - 43u);  // 43 missed; a spurious one may sit on a pulse
  EXPECT_LT(r->rms_s, 1e-6);
  for (const AlignPair& p : r->pairs) EXPECT_NEAR(p.other_s, a + b * s[p.session_index], 1e-6);
}

TEST(AlignTest, RefusesARegularTrainItCannotPlace) {
  // No jitter: every shift by whole pulses fits as well (common practice,
  // no source: why sync trains are made aperiodic).
  std::vector<double> s, o;
  for (int i = 0; i < 100; ++i) s.push_back(10.0 + i);
  for (int i = 0; i < 80; ++i) o.push_back(500.0 + i);
  auto r = AlignPulses(s, o, AlignOptions{});
  ASSERT_FALSE(r.ok());
  EXPECT_NE(r.status().message().find("ambiguous"), std::string::npos) << r.status();
}

TEST(AlignTest, RefusesTooFewPairs) {
  const std::vector<double> s = Train(50, 2);
  const std::vector<double> o = Train(5, 9);
  auto r = AlignPulses(s, o, AlignOptions{});
  ASSERT_FALSE(r.ok());
  EXPECT_NE(r.status().message().find("too few"), std::string::npos) << r.status();
  // Unrelated trains of enough pulses pair too few of them.
  auto r2 = AlignPulses(Train(200, 2), Train(200, 9), AlignOptions{});
  EXPECT_FALSE(r2.ok());
}

TEST(AlignTest, ReadsAColumnByNameOrNumberWithOrWithoutHeader) {
  auto plain = ReadCsvColumn("1.5\n2.25\n\n# note\n3\n", "", "t.csv");
  ASSERT_TRUE(plain.ok());
  EXPECT_EQ(*plain, (std::vector<double>{1.5, 2.25, 3}));
  auto headed = ReadCsvColumn("sample,time_s\r\n10,0.5\r\n11,\"0.75\"\r\n", "time_s", "t.csv");
  ASSERT_TRUE(headed.ok()) << headed.status();
  EXPECT_EQ(*headed, (std::vector<double>{0.5, 0.75}));
  auto numbered = ReadCsvColumn("sample,time_s\n10,0.5\n", "2", "t.csv");
  ASSERT_TRUE(numbered.ok());
  EXPECT_EQ(*numbered, (std::vector<double>{0.5}));
  auto bad = ReadCsvColumn("t\n1\nsoon\n", "", "t.csv");
  ASSERT_FALSE(bad.ok());
  EXPECT_NE(bad.status().message().find("t.csv:3"), std::string::npos) << bad.status();
  EXPECT_FALSE(ReadCsvColumn("a,b\n1,2\n", "c", "t.csv").ok());
}

TEST(AlignTest, FitLineMatchesTheNormalEquations) {
  // y = 2 + 3x exactly: zero standard errors.
  double a = 0, b = 0, ase = 1, bse = 1;
  ASSERT_TRUE(FitLine({0, 1, 2, 3}, {2, 5, 8, 11}, &a, &b, &ase, &bse));
  EXPECT_DOUBLE_EQ(a, 2);
  EXPECT_DOUBLE_EQ(b, 3);
  EXPECT_DOUBLE_EQ(bse, 0);
  EXPECT_FALSE(FitLine({1, 1}, {2, 3}, &a, &b, &ase, &bse));
}

}  // namespace
}  // namespace tickmark::cli

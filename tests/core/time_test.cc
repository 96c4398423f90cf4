// Time types: arithmetic on values from outside saturates or is checked,
// never wraps (issue 9.5: a probe reply's T3 − T2 wrapped).
#include "server/core/time.h"

#include <cmath>
#include <cstdint>
#include <limits>

#include "gtest/gtest.h"

namespace tickmark::time_test {
namespace {

constexpr int64_t kMin = std::numeric_limits<int64_t>::min();
constexpr int64_t kMax = std::numeric_limits<int64_t>::max();

TEST(DurationTest, ArithmeticSaturatesInsteadOfWrapping) {
  EXPECT_EQ(Duration::Max() + Duration::Nanos(1), Duration::Max());
  EXPECT_EQ(Duration::Min() - Duration::Nanos(1), Duration::Min());
  EXPECT_EQ(Duration::Nanos(kMax) - Duration::Nanos(kMin), Duration::Max());
  EXPECT_EQ(Duration::Nanos(kMin) - Duration::Nanos(kMax), Duration::Min());
  EXPECT_EQ(-Duration::Min(), Duration::Max());
  EXPECT_EQ(Abs(Duration::Min()), Duration::Max());
  EXPECT_EQ(Duration::Min() / -1, Duration::Max());
  EXPECT_EQ(Duration::Seconds(kMax / 2) * 4, Duration::Max());
  EXPECT_EQ(Duration::Seconds(kMax / 2) * -4, Duration::Min());
  EXPECT_EQ(Duration::Seconds(kMax), Duration::Max());
  EXPECT_EQ(Duration::Millis(kMin), Duration::Min());
  EXPECT_EQ(Duration::Micros(kMax), Duration::Max());
  Duration d = Duration::Max();
  d += Duration::Seconds(1);
  EXPECT_EQ(d, Duration::Max());
  d = Duration::Min();
  d -= Duration::Seconds(1);
  EXPECT_EQ(d, Duration::Min());
  // In range, the plain results.
  EXPECT_EQ((Duration::Seconds(3) - Duration::Millis(500)).nanos(), 2'500'000'000);
  EXPECT_EQ((Duration::Seconds(-3) / 2).nanos(), -1'500'000'000);
}

TEST(DurationTest, FromSecondsSaturatesAndMapsNanToZero) {
  EXPECT_EQ(Duration::FromSeconds(1e300), Duration::Max());
  EXPECT_EQ(Duration::FromSeconds(-1e300), Duration::Min());
  EXPECT_EQ(Duration::FromSeconds(INFINITY), Duration::Max());
  EXPECT_EQ(Duration::FromSeconds(-INFINITY), Duration::Min());
  EXPECT_EQ(Duration::FromSeconds(NAN), Duration::Zero());
  EXPECT_EQ(Duration::FromSeconds(9.3e9), Duration::Max());  // just above 2^63 ns
  EXPECT_EQ(Duration::FromSeconds(1.5).nanos(), 1'500'000'000);
}

TEST(InstantTest, ArithmeticSaturatesInsteadOfWrapping) {
  const SessionTime lo = SessionTime::FromNanos(kMin);
  const SessionTime hi = SessionTime::FromNanos(kMax);
  EXPECT_EQ(hi - lo, Duration::Max());
  EXPECT_EQ(lo - hi, Duration::Min());
  EXPECT_EQ(hi + Duration::Seconds(1), hi);
  EXPECT_EQ(lo - Duration::Seconds(1), lo);
  SessionTime t = hi;
  t += Duration::Nanos(1);
  EXPECT_EQ(t, hi);
}

TEST(InstantTest, CheckedOperationsSayWhenTheResultDoesNotFit) {
  const ClientTime lo = ClientTime::FromNanos(kMin);
  const ClientTime hi = ClientTime::FromNanos(kMax);
  EXPECT_FALSE(CheckedSub(hi, lo).has_value());
  EXPECT_FALSE(CheckedSub(lo, hi).has_value());
  EXPECT_EQ(CheckedSub(hi, hi), Duration::Zero());
  EXPECT_FALSE(CheckedAdd(hi, Duration::Nanos(1)).has_value());
  EXPECT_EQ(CheckedAdd(lo, Duration::Nanos(1))->nanos(), kMin + 1);
  EXPECT_FALSE(CheckedAdd(Duration::Max(), Duration::Nanos(1)).has_value());
  EXPECT_FALSE(CheckedSub(Duration::Min(), Duration::Nanos(1)).has_value());
  EXPECT_EQ(CheckedSub(Duration::Seconds(2), Duration::Seconds(3)), -Duration::Seconds(1));
}

TEST(SessionClockTest, ExtremeAnchorsSaturate) {
  FakeMonotonic mono(0);
  const SessionClock late(kMax - 10, 0, &mono);
  mono.Set(1'000);
  EXPECT_EQ(late.Now().nanos(), kMax);
  const SessionClock early(0, kMax, &mono);  // anchored at a reading far ahead
  mono.Set(kMin);
  EXPECT_EQ(early.Now().nanos(), kMin);
}

TEST(SystemMonotonicTest, OneSharedInstanceThatMovesForward) {
  const SystemMonotonic* clock = SystemMonotonic::Get();
  ASSERT_EQ(clock, SystemMonotonic::Get());
  const int64_t a = clock->NowNanos();
  EXPECT_GE(clock->NowNanos(), a);
}

}  // namespace
}  // namespace tickmark::time_test

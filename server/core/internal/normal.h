// The standard normal distribution's constants and CDF, shared by core's .cc
// files (internal: only they include it).
#ifndef TICKMARK_SERVER_CORE_INTERNAL_NORMAL_H_
#define TICKMARK_SERVER_CORE_INTERNAL_NORMAL_H_

#include <cmath>

namespace tickmark::internal {

inline constexpr double kInvSqrt2 = 0.70710678118654752440;    // 1 / sqrt(2)
inline constexpr double kLogSqrt2Pi = 0.91893853320467274178;  // ln sqrt(2 pi)

// Phi(t), the standard normal CDF.
inline double NormalCdf(double t) { return 0.5 * std::erfc(-t * kInvSqrt2); }

}  // namespace tickmark::internal

#endif  // TICKMARK_SERVER_CORE_INTERNAL_NORMAL_H_

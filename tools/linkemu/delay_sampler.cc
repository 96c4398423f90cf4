#include "tools/linkemu/delay_sampler.h"

#include <cmath>

namespace tickmark::linkemu {
namespace {

// Redraws beyond this many are astronomically unlikely (each draw is accepted
// with probability at least 1/2 because the jitter is symmetric and the base
// delay is not negative); the bound only keeps the loop finite.
constexpr int kMaxRedraws = 64;

std::seed_seq SeedFor(uint64_t seed, Direction direction) {
  return std::seed_seq{static_cast<uint32_t>(seed),
                       static_cast<uint32_t>(seed >> 32),
                       direction == Direction::kForward ? 1u : 2u};
}

}  // namespace

DelaySampler::DelaySampler(const LinkProfile& profile, Direction direction)
    : delay_(direction == Direction::kForward ? profile.forward_delay
                                              : profile.backward_delay),
      jitter_(direction == Direction::kForward ? profile.forward_jitter
                                               : profile.backward_jitter),
      loss_(direction == Direction::kForward ? profile.forward_loss
                                             : profile.backward_loss) {
  auto seq = SeedFor(profile.seed, direction);
  rng_.seed(seq);
}

Duration DelaySampler::NextDelay() {
  if (jitter_.kind == Jitter::Kind::kNone ||
      jitter_.amount == Duration::Zero()) {
    return delay_;
  }
  for (int i = 0; i < kMaxRedraws; ++i) {
    Duration sample = delay_;
    if (jitter_.kind == Jitter::Kind::kUniform) {
      const int64_t j = jitter_.amount.nanos();
      sample += Duration::Nanos(std::uniform_int_distribution<int64_t>(-j, j)(rng_));
    } else {
      std::normal_distribution<double> normal(
          0.0, static_cast<double>(jitter_.amount.nanos()));
      sample += Duration::Nanos(std::llround(normal(rng_)));
    }
    if (sample >= Duration::Zero()) return sample;
  }
  return Duration::Zero();
}

bool DelaySampler::NextLost() {
  return std::bernoulli_distribution(loss_)(rng_);
}

}  // namespace tickmark::linkemu

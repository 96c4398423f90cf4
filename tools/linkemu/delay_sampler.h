// Draws one direction's per-packet fate from a LinkProfile: whether it is
// lost and how long it is delayed. Pure logic (no I/O, no clock), so tests
// feed it a seed and check the draws.
//
// The sequence of draws is fixed by (seed, direction); with the same order
// of packets a run repeats exactly. Not thread-safe: each proxy uses its
// samplers from its own I/O thread only.
#ifndef TICKMARK_TOOLS_LINKEMU_DELAY_SAMPLER_H_
#define TICKMARK_TOOLS_LINKEMU_DELAY_SAMPLER_H_

#include <cstdint>
#include <random>

#include "server/core/time.h"
#include "tools/linkemu/link_profile.h"

namespace tickmark::linkemu {

enum class Direction { kForward, kBackward };

class DelaySampler {
 public:
  // Takes the fields of `profile` that belong to `direction`. The profile
  // must be Valid().
  DelaySampler(const LinkProfile& profile, Direction direction);

  // One one-way delay: delay + jitter, redrawn while negative; never below
  // zero and never above delay + jitter bound (uniform).
  Duration NextDelay();

  // True if the next packet is lost (probability = the direction's loss).
  bool NextLost();

 private:
  Duration delay_;       // base one-way delay
  Jitter jitter_;        // variation around delay_
  double loss_;          // loss probability, in [0, 1]
  std::mt19937_64 rng_;  // the direction's own stream of draws
};

}  // namespace tickmark::linkemu

#endif  // TICKMARK_TOOLS_LINKEMU_DELAY_SAMPLER_H_

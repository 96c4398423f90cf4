// What an emulated link does to traffic: one-way delay, jitter and loss per
// direction. Forward is client→server (the side that connects to the proxy
// towards the target), backward is server→client.
//
// A one-way delay sample is delay + jitter, redrawn until it is not negative
// (truncation, not clamping, so no probability piles up at zero). Loss
// applies to datagrams only; a TCP stream cannot lose bytes, so the TCP proxy
// ignores it.
//
// Plain values; thread-compatible.
#ifndef TICKMARK_TOOLS_LINKEMU_LINK_PROFILE_H_
#define TICKMARK_TOOLS_LINKEMU_LINK_PROFILE_H_

#include <cmath>
#include <cstdint>

#include "server/core/time.h"

namespace tickmark::linkemu {

// Random variation added to each one-way delay.
struct Jitter {
  enum class Kind {
    kNone,     // every sample is exactly the delay
    kUniform,  // delay + U[-amount, +amount]
    kNormal,   // delay + N(0, amount²), truncated at a total of zero
  };

  static constexpr Jitter None() { return Jitter{}; }
  static constexpr Jitter Uniform(Duration half_width) {
    return Jitter{Kind::kUniform, half_width};
  }
  static constexpr Jitter Normal(Duration sigma) {
    return Jitter{Kind::kNormal, sigma};
  }

  Kind kind = Kind::kNone;  // shape of the variation
  Duration amount;          // half-width (uniform) or standard deviation (normal)
};

struct LinkProfile {
  // The same delay, jitter and loss both ways.
  static LinkProfile Symmetric(Duration delay, Jitter jitter = Jitter::None(),
                               double loss = 0.0, uint64_t seed = 1) {
    return LinkProfile{delay, delay, jitter, jitter, loss, loss, seed};
  }

  // True when every field is in range: delays and jitter amounts not
  // negative, losses finite and within [0, 1].
  bool Valid() const {
    auto loss_ok = [](double p) { return std::isfinite(p) && p >= 0.0 && p <= 1.0; };
    return forward_delay >= Duration::Zero() &&
           backward_delay >= Duration::Zero() &&
           forward_jitter.amount >= Duration::Zero() &&
           backward_jitter.amount >= Duration::Zero() &&
           loss_ok(forward_loss) && loss_ok(backward_loss);
  }

  Duration forward_delay;   // base one-way delay, client→server
  Duration backward_delay;  // base one-way delay, server→client
  Jitter forward_jitter;    // variation of the forward delay
  Jitter backward_jitter;   // variation of the backward delay
  double forward_loss = 0.0;   // probability a forward datagram is dropped
  double backward_loss = 0.0;  // probability a backward datagram is dropped
  uint64_t seed = 1;  // fixes every random draw, so a run can be repeated
};

}  // namespace tickmark::linkemu

#endif  // TICKMARK_TOOLS_LINKEMU_LINK_PROFILE_H_

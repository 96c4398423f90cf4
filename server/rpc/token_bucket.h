// A token bucket: `rate` tokens a second, at most `burst` saved up. Used for
// the per-token and per-stream limits on feedback and steps.
//
// Time comes from an injected MonotonicSource, so tests drive it by hand.
// Thread safety: thread-safe (an internal mutex; buckets are shared by the
// streams of one token).
#ifndef TICKMARK_SERVER_RPC_TOKEN_BUCKET_H_
#define TICKMARK_SERVER_RPC_TOKEN_BUCKET_H_

#include <mutex>

#include "server/core/time.h"

namespace tickmark::rpc {

class TokenBucket {
 public:
  // Starts full. rate <= 0 means unlimited.
  TokenBucket(double rate_per_s, double burst, const MonotonicSource* clock);

  // Takes one token if there is one.
  bool TryTake();

 private:
  const double rate_per_s_;
  const double burst_;
  const MonotonicSource* const clock_;  // not owned
  std::mutex mu_;
  double tokens_;    // GUARDED_BY(mu_)
  int64_t last_ns_;  // clock reading of the last refill; GUARDED_BY(mu_)
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_TOKEN_BUCKET_H_

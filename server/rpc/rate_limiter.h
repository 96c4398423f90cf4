// Rate limits on what trainers and agents send: one token bucket per token
// (shared by every stream of that token), and a count of refused messages
// per client, for operators and tests. Per-stream buckets are owned by the
// streams themselves (TokenBucket).
//
// Thread safety: thread-safe.
#ifndef TICKMARK_SERVER_RPC_RATE_LIMITER_H_
#define TICKMARK_SERVER_RPC_RATE_LIMITER_H_

#include <map>
#include <memory>
#include <mutex>
#include <string>

#include "server/rpc/token_bucket.h"

namespace tickmark::rpc {

class RateLimiter {
 public:
  struct Rate {
    double per_s = 0;  // <= 0: unlimited
    double burst = 0;
  };
  explicit RateLimiter(const MonotonicSource* clock) : clock_(clock) {}

  // The bucket of a token, created with `rate` on first use.
  std::shared_ptr<TokenBucket> BucketOf(const std::string& token_id, Rate rate);
  // A new bucket for one stream.
  std::unique_ptr<TokenBucket> NewBucket(Rate rate) const;

  // Counts one refused message of a client (key: "session/client_id").
  void NoteLimited(const std::string& client_key);
  uint64_t Limited(const std::string& client_key) const;
  uint64_t TotalLimited() const;

 private:
  const MonotonicSource* const clock_;  // not owned
  mutable std::mutex mu_;
  std::map<std::string, std::shared_ptr<TokenBucket>> buckets_;  // GUARDED_BY(mu_)
  std::map<std::string, uint64_t> limited_;                      // GUARDED_BY(mu_)
  uint64_t total_limited_ = 0;                                   // GUARDED_BY(mu_)
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_RATE_LIMITER_H_

#include "server/rpc/rate_limiter.h"

namespace tickmark::rpc {

std::shared_ptr<TokenBucket> RateLimiter::BucketOf(const std::string& token_id, Rate rate) {
  std::lock_guard<std::mutex> lock(mu_);
  auto& bucket = buckets_[token_id];
  if (!bucket) bucket = std::make_shared<TokenBucket>(rate.per_s, rate.burst, clock_);
  return bucket;
}

std::unique_ptr<TokenBucket> RateLimiter::NewBucket(Rate rate) const {
  return std::make_unique<TokenBucket>(rate.per_s, rate.burst, clock_);
}

void RateLimiter::NoteLimited(const std::string& client_key) {
  std::lock_guard<std::mutex> lock(mu_);
  ++limited_[client_key];
  ++total_limited_;
}

uint64_t RateLimiter::Limited(const std::string& client_key) const {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = limited_.find(client_key);
  return it == limited_.end() ? 0 : it->second;
}

uint64_t RateLimiter::TotalLimited() const {
  std::lock_guard<std::mutex> lock(mu_);
  return total_limited_;
}

}  // namespace tickmark::rpc

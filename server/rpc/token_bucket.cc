#include "server/rpc/token_bucket.h"

#include <algorithm>

namespace tickmark::rpc {

TokenBucket::TokenBucket(double rate_per_s, double burst, const MonotonicSource* clock)
    : rate_per_s_(rate_per_s),
      burst_(std::max(1.0, burst)),
      clock_(clock),
      tokens_(std::max(1.0, burst)),
      last_ns_(clock->NowNanos()) {}

bool TokenBucket::TryTake() {
  if (rate_per_s_ <= 0) return true;
  std::lock_guard<std::mutex> lock(mu_);
  const int64_t now = clock_->NowNanos();
  if (now > last_ns_) {
    tokens_ = std::min(burst_, tokens_ + static_cast<double>(now - last_ns_) * 1e-9 * rate_per_s_);
    last_ns_ = now;
  }
  if (tokens_ < 1.0) return false;
  tokens_ -= 1.0;
  return true;
}

}  // namespace tickmark::rpc

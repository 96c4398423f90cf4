#include "server/rpc/strand.h"

namespace tickmark::rpc {
namespace {
// Closures one Drain runs before giving the pool thread to other strands.
constexpr int kDrainBatch = 32;
}  // namespace

void Strand::Post(std::function<void()> fn) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    queue_.push_back(std::move(fn));
    if (scheduled_) return;
    scheduled_ = true;
  }
  Schedule();
}

void Strand::Schedule() {
  if (pool_->Submit([self = shared_from_this()] { self->Drain(); })) return;
  // The pool has stopped: nothing will run; drop what is queued so that the
  // closures release the streams they hold.
  std::deque<std::function<void()>> dropped;
  std::lock_guard<std::mutex> lock(mu_);
  dropped.swap(queue_);
  scheduled_ = false;  // the next Post tries again, and drops too
}

void Strand::Drain() {
  for (int i = 0; i < kDrainBatch; ++i) {
    std::function<void()> fn;
    {
      std::lock_guard<std::mutex> lock(mu_);
      if (queue_.empty()) {
        scheduled_ = false;
        return;
      }
      fn = std::move(queue_.front());
      queue_.pop_front();
    }
    fn();
  }
  Schedule();
}

}  // namespace tickmark::rpc

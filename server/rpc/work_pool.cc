#include "server/rpc/work_pool.h"

namespace tickmark::rpc {

WorkPool::WorkPool(int threads) {
  for (int i = 0; i < (threads < 1 ? 1 : threads); ++i) {
    threads_.emplace_back([this] { Loop(); });
  }
}

WorkPool::~WorkPool() { Stop(); }

bool WorkPool::Submit(std::function<void()> fn) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    // While Stop drains the queue, work submitted from a running closure
    // (a strand's next batch, a stream's last clean-up) is still taken.
    if (joined_) return false;  // fn is destroyed on return, outside the lock
    queue_.push_back(std::move(fn));
  }
  cv_.notify_one();
  return true;
}

void WorkPool::Stop() {
  {
    std::lock_guard<std::mutex> lock(mu_);
    stopping_ = true;
  }
  cv_.notify_all();
  for (std::thread& t : threads_) {
    if (t.joinable()) t.join();
  }
  std::deque<std::function<void()>> left;  // submitted after the last thread left
  std::lock_guard<std::mutex> lock(mu_);
  joined_ = true;
  left.swap(queue_);
}

void WorkPool::Loop() {
  std::unique_lock<std::mutex> lock(mu_);
  while (true) {
    cv_.wait(lock, [this] { return stopping_ || !queue_.empty(); });
    if (queue_.empty()) return;  // stopping, and nothing left
    std::function<void()> fn = std::move(queue_.front());
    queue_.pop_front();
    lock.unlock();
    fn();
    fn = nullptr;  // release what it holds before taking the lock again
    lock.lock();
  }
}

}  // namespace tickmark::rpc

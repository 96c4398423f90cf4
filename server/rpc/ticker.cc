#include "server/rpc/ticker.h"

#include <algorithm>
#include <chrono>

namespace tickmark::rpc {
namespace {
// The longest the loop sleeps: how late a timer on a clock that does not
// follow the system's (a test's hand-driven clock) may fire.
constexpr int64_t kMaxSleepNs = 10'000'000;
}  // namespace

Ticker::Ticker() : thread_([this] { Loop(); }) {}

Ticker::~Ticker() { Stop(); }

void Ticker::WakeAt(std::weak_ptr<Tickable> t, const MonotonicSource* clock, int64_t at_ns) {
  bool earliest = false;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (stopping_) return;
    Heap& heap = heaps_[clock];
    earliest = heap.empty() || at_ns < heap.top().at;
    heap.push(Entry{at_ns, std::move(t)});
  }
  if (earliest) cv_.notify_one();  // the loop may be sleeping past it
}

size_t Ticker::pending() {
  std::lock_guard<std::mutex> lock(mu_);
  size_t n = 0;
  for (auto& [clock, heap] : heaps_) n += heap.size();
  return n;
}

void Ticker::Stop() {
  {
    std::lock_guard<std::mutex> lock(mu_);
    stopping_ = true;
  }
  cv_.notify_all();
  if (thread_.joinable()) thread_.join();
  std::map<const MonotonicSource*, Heap> dropped;  // released outside the lock
  std::lock_guard<std::mutex> lock(mu_);
  dropped.swap(heaps_);
}

void Ticker::Loop() {
  std::vector<std::shared_ptr<Tickable>> due;
  std::unique_lock<std::mutex> lock(mu_);
  while (!stopping_) {
    int64_t sleep_ns = kMaxSleepNs;
    for (auto& [clock, heap] : heaps_) {
      const int64_t now = clock->NowNanos();
      while (!heap.empty() && heap.top().at <= now) {
        if (auto t = heap.top().t.lock()) due.push_back(std::move(t));
        heap.pop();
      }
      if (!heap.empty()) sleep_ns = std::min(sleep_ns, heap.top().at - now);
    }
    if (!due.empty()) {
      lock.unlock();
      for (auto& t : due) t->OnTick();
      due.clear();  // the last reference may go here, outside the lock
      lock.lock();
      continue;  // OnTick may have set timers that are due already
    }
    cv_.wait_for(lock, std::chrono::nanoseconds(std::max<int64_t>(sleep_ns, 1)));
  }
}

}  // namespace tickmark::rpc

#include "server/rpc/ticker.h"

#include <chrono>
#include <vector>

namespace tickmark::rpc {

Ticker::Ticker() : thread_([this] { Loop(); }) {}

Ticker::~Ticker() { Stop(); }

void Ticker::Add(const std::shared_ptr<Tickable>& t) {
  std::lock_guard<std::mutex> lock(mu_);
  tickables_[t.get()] = t;
}

void Ticker::Remove(Tickable* t) {
  std::lock_guard<std::mutex> lock(mu_);
  tickables_.erase(t);
}

void Ticker::Stop() {
  {
    std::lock_guard<std::mutex> lock(mu_);
    stopping_ = true;
  }
  cv_.notify_all();
  if (thread_.joinable()) thread_.join();
}

void Ticker::Loop() {
  std::unique_lock<std::mutex> lock(mu_);
  while (!stopping_) {
    cv_.wait_for(lock, std::chrono::milliseconds(10));
    std::vector<std::shared_ptr<Tickable>> live;
    for (auto& [raw, weak] : tickables_) {
      if (auto t = weak.lock()) live.push_back(std::move(t));
    }
    lock.unlock();
    for (auto& t : live) t->OnTick();
    live.clear();  // the last reference may go here, outside the lock
    lock.lock();
  }
}

}  // namespace tickmark::rpc

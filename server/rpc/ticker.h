// Drives periodic work of the live streams (clock probes, hello timeouts,
// releasing messages that waited for a clock model) from one thread, about
// every 10 ms.
//
// Thread safety: Add/Remove/Stop from any thread. OnTick is called on the
// ticker thread with no lock of the ticker held, so a Tickable may call
// Add/Remove from it. A Tickable is held weakly: one that is destroyed is
// simply skipped.
#ifndef TICKMARK_SERVER_RPC_TICKER_H_
#define TICKMARK_SERVER_RPC_TICKER_H_

#include <condition_variable>
#include <map>
#include <memory>
#include <mutex>
#include <thread>

namespace tickmark::rpc {

// Something the ticker drives.
class Tickable {
 public:
  virtual ~Tickable() = default;
  // Must not block: post work to the stream's strand instead.
  virtual void OnTick() = 0;
};

class Ticker {
 public:
  Ticker();
  ~Ticker();
  Ticker(const Ticker&) = delete;
  Ticker& operator=(const Ticker&) = delete;

  void Add(const std::shared_ptr<Tickable>& t);
  void Remove(Tickable* t);
  // Stops and joins the thread. Idempotent.
  void Stop();

 private:
  void Loop();

  std::mutex mu_;
  std::condition_variable cv_;                              // wakes the loop to stop
  std::map<Tickable*, std::weak_ptr<Tickable>> tickables_;  // GUARDED_BY(mu_)
  bool stopping_ = false;                                   // GUARDED_BY(mu_)
  std::thread thread_;                                      // runs Loop
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_TICKER_H_

// Timers of the live streams (clock probes, hello timeouts, releasing
// messages that waited for a clock model, resuming reads after a rate-limit
// pause), from one thread.
//
// A stream asks to be woken when one of its clocks reaches a time (WakeAt);
// the ticker keeps one min-heap per clock and wakes only the streams whose
// time has come, so its cost follows the timers that fire, not the number
// of open streams (it used to call every stream every 10 ms: with 10,000
// streams a million calls a second for nothing). The thread sleeps until the
// earliest time on any clock, but at most 10 ms, so a clock that is not the
// system's (tests drive one by hand) is still read often enough.
//
// Nothing on the delivery path waits for the ticker: acks, credit updates
// and subscriber wake-ups run from the ledger's commit callbacks (see
// session_hub.h).
//
// Thread safety: WakeAt/Stop from any thread. OnTick is called on the ticker
// thread with no lock of the ticker held, so a Tickable may call WakeAt from
// it. A Tickable is held weakly: one that is destroyed is simply skipped. A
// Tickable may be woken early or more than once (stale entries are kept
// rather than searched for); OnTick checks what is really due.
#ifndef TICKMARK_SERVER_RPC_TICKER_H_
#define TICKMARK_SERVER_RPC_TICKER_H_

#include <condition_variable>
#include <map>
#include <memory>
#include <mutex>
#include <queue>
#include <thread>
#include <vector>

#include "server/core/time.h"

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

  // Calls t->OnTick() once clock->NowNanos() >= at_ns. `clock` must outlive
  // the ticker.
  void WakeAt(std::weak_ptr<Tickable> t, const MonotonicSource* clock, int64_t at_ns);
  // Stops and joins the thread. Idempotent.
  void Stop();

  // Timers waiting (for tests and operators).
  size_t pending();

 private:
  struct Entry {
    int64_t at;
    std::weak_ptr<Tickable> t;
    bool operator>(const Entry& o) const { return at > o.at; }
  };
  using Heap = std::priority_queue<Entry, std::vector<Entry>, std::greater<Entry>>;

  void Loop();

  std::mutex mu_;
  std::condition_variable cv_;                    // wakes the loop: stop, or an earlier timer
  std::map<const MonotonicSource*, Heap> heaps_;  // GUARDED_BY(mu_)
  bool stopping_ = false;                         // GUARDED_BY(mu_)
  std::thread thread_;                            // runs Loop
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_TICKER_H_

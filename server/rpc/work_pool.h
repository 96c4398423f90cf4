// A few threads that run submitted closures: the place where the live
// service does work that may block (ledger reads, token look-ups) or that
// must not run on the thread that triggered it (a ledger commit callback, a
// session runtime calling its streams with its own locks held).
//
// Thread safety: Submit and Stop may be called from any thread (Stop not
// from a pool thread). Stop runs what is queued, including work submitted
// while it drains; closures submitted once its threads are gone are dropped
// (destroyed unrun), so whatever they hold is released.
#ifndef TICKMARK_SERVER_RPC_WORK_POOL_H_
#define TICKMARK_SERVER_RPC_WORK_POOL_H_

#include <condition_variable>
#include <deque>
#include <functional>
#include <mutex>
#include <thread>
#include <vector>

namespace tickmark::rpc {

class WorkPool {
 public:
  explicit WorkPool(int threads);
  ~WorkPool();
  WorkPool(const WorkPool&) = delete;
  WorkPool& operator=(const WorkPool&) = delete;

  // False (and fn destroyed unrun) once stopping.
  bool Submit(std::function<void()> fn);
  // Runs what is queued, then joins the threads. Idempotent.
  void Stop();

 private:
  void Loop();

  std::mutex mu_;
  std::condition_variable cv_;
  std::deque<std::function<void()>> queue_;  // GUARDED_BY(mu_)
  bool stopping_ = false;                    // GUARDED_BY(mu_)
  bool joined_ = false;                      // threads gone: Submit refuses; GUARDED_BY(mu_)
  std::vector<std::thread> threads_;
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_WORK_POOL_H_

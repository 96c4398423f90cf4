// Runs one stream's work one closure at a time, in the order posted, on a
// WorkPool thread — never on the thread that posts.
//
// Why: a stream's state is touched from gRPC reactions, ledger commit
// callbacks, the ticker, the UDP probe port and session runtimes that call
// their streams while holding their own locks. A commit callback may run on
// the caller's thread (a ledger failing fast); if it took the stream's lock
// while the stream held it around Append, the stream deadlocked (a full
// disk did exactly that). With a strand no lock is held while a closure
// runs, and posting only queues, so any callback may post from anywhere,
// including from inside a closure of the same strand.
//
// Thread safety: Post may be called from any thread. Closures of one strand
// never run concurrently, and each sees everything the previous one wrote.
#ifndef TICKMARK_SERVER_RPC_STRAND_H_
#define TICKMARK_SERVER_RPC_STRAND_H_

#include <deque>
#include <functional>
#include <memory>
#include <mutex>

#include "server/rpc/work_pool.h"

namespace tickmark::rpc {

class Strand : public std::enable_shared_from_this<Strand> {
 public:
  // `pool` must outlive every closure posted here.
  explicit Strand(WorkPool* pool) : pool_(pool) {}

  void Post(std::function<void()> fn);

 private:
  // Runs queued closures on a pool thread; after a bounded number it
  // resubmits itself so that one busy stream cannot hold a pool thread.
  void Drain();
  void Schedule();

  WorkPool* const pool_;  // not owned
  std::mutex mu_;         // guards the queue only; never held while a closure runs
  std::deque<std::function<void()>> queue_;  // GUARDED_BY(mu_)
  bool scheduled_ = false;                   // a Drain is queued or running; GUARDED_BY(mu_)
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_STRAND_H_

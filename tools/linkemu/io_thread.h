// One io_context and the thread that runs it. A proxy owns one, so its
// sockets, timers and samplers are only ever touched from that thread and
// need no locks.
//
// Start() and Stop() are not synchronised with each other; the owning proxy
// serialises them under its own mutex. RunSync() may be called from any
// thread but the I/O thread itself.
#ifndef TICKMARK_TOOLS_LINKEMU_IO_THREAD_H_
#define TICKMARK_TOOLS_LINKEMU_IO_THREAD_H_

#include <functional>
#include <optional>
#include <thread>

#include <boost/asio/executor_work_guard.hpp>
#include <boost/asio/io_context.hpp>

namespace tickmark::linkemu {

class IoThread {
 public:
  IoThread() = default;
  IoThread(const IoThread&) = delete;
  IoThread& operator=(const IoThread&) = delete;
  // Stops the thread if it still runs.
  ~IoThread();

  // The context to create sockets and timers on (before or after Start).
  boost::asio::io_context& context() { return io_; }

  // Starts the thread. Call at most once.
  void Start();

  // Runs `fn` on the I/O thread and returns once it has run. Before Start or
  // after Stop there is no I/O thread, so `fn` runs on the caller's thread.
  void RunSync(const std::function<void()>& fn);

  // Stops the context and joins the thread. Handlers still queued are
  // destroyed with the context, not run. Idempotent.
  void Stop();

 private:
  boost::asio::io_context io_;  // every socket and timer of the owner lives here
  std::optional<boost::asio::executor_work_guard<
      boost::asio::io_context::executor_type>>
      work_;            // keeps run() going while the owner has no pending I/O
  std::thread thread_;  // runs io_.run(); joinable between Start and Stop
};

}  // namespace tickmark::linkemu

#endif  // TICKMARK_TOOLS_LINKEMU_IO_THREAD_H_

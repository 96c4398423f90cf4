// The controlling terminal in cbreak mode, and the signals that must give it
// back.
//
// RawTerminal turns off line buffering and echo (ICANON, ECHO) so that each
// key press reaches read() at once, and restores the saved settings when
// destroyed, when the process is stopped (Ctrl-Z) and when it is asked to
// quit (Ctrl-C, SIGTERM, SIGHUP). ISIG stays on, so Ctrl-C and Ctrl-Z still
// arrive as signals.
//
// SignalWatcher handles those signals on a thread of its own with sigwait(),
// so no terminal code runs inside an asynchronous signal handler. The signals
// must be blocked (BlockTerminalSignals) before any other thread starts —
// gRPC starts threads — so that only the watcher receives them.
//
// RawTerminal is thread-safe (one mutex); SignalWatcher is created and
// destroyed by one thread.
#ifndef TICKMARK_CLIENTS_KEYS_TERMINAL_H_
#define TICKMARK_CLIENTS_KEYS_TERMINAL_H_

#include <termios.h>

#include <atomic>
#include <functional>
#include <mutex>
#include <thread>

#include "absl/status/status.h"

namespace tickmark::keys {

class RawTerminal {
 public:
  explicit RawTerminal(int fd) : fd_(fd) {}
  ~RawTerminal() { Restore(); }
  RawTerminal(const RawTerminal&) = delete;
  RawTerminal& operator=(const RawTerminal&) = delete;

  // Saves the settings (first call only) and enters cbreak mode.
  absl::Status Enter();
  // Puts the saved settings back; harmless if not entered.
  void Restore();
  // Columns of the terminal, 0 if unknown.
  size_t Columns() const;

 private:
  const int fd_;
  mutable std::mutex mu_;
  bool saved_ = false;  // guarded by mu_
  bool raw_ = false;    // guarded by mu_
  termios original_{};  // guarded by mu_
};

// Blocks SIGINT, SIGTERM, SIGHUP, SIGTSTP and SIGUSR1 in the calling thread
// (and every thread it starts later).
void BlockTerminalSignals();

class SignalWatcher {
 public:
  // on_quit: SIGINT, SIGTERM or SIGHUP arrived. Ctrl-Z restores `terminal`,
  // stops the process, and on continuing re-enters cbreak mode and calls
  // on_resume. Callbacks run on the watcher thread.
  SignalWatcher(RawTerminal* terminal, std::function<void()> on_quit,
                std::function<void()> on_resume);
  ~SignalWatcher();

 private:
  std::thread thread_;
  std::atomic<bool> stopping_{false};
};

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_TERMINAL_H_

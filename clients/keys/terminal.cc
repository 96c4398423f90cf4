#include "clients/keys/terminal.h"

#include <pthread.h>
#include <signal.h>
#include <sys/ioctl.h>
#include <unistd.h>

#include <cerrno>
#include <cstring>
#include <string>

namespace tickmark::keys {
namespace {

sigset_t TerminalSignals() {
  sigset_t set;
  sigemptyset(&set);
  for (int s : {SIGINT, SIGTERM, SIGHUP, SIGTSTP, SIGUSR1}) sigaddset(&set, s);
  return set;
}

}  // namespace

absl::Status RawTerminal::Enter() {
  std::lock_guard<std::mutex> lock(mu_);
  if (!saved_) {
    if (tcgetattr(fd_, &original_) != 0) {
      return absl::ErrnoToStatus(errno, "tcgetattr");
    }
    saved_ = true;
  }
  termios raw = original_;
  raw.c_lflag &= ~static_cast<tcflag_t>(ICANON | ECHO);
  raw.c_cc[VMIN] = 1;
  raw.c_cc[VTIME] = 0;
  if (tcsetattr(fd_, TCSANOW, &raw) != 0) {
    return absl::ErrnoToStatus(errno, "tcsetattr");
  }
  raw_ = true;
  return absl::OkStatus();
}

void RawTerminal::Restore() {
  std::lock_guard<std::mutex> lock(mu_);
  if (saved_ && raw_) {
    tcsetattr(fd_, TCSANOW, &original_);
    raw_ = false;
  }
}

size_t RawTerminal::Columns() const {
  winsize ws{};
  if (ioctl(fd_, TIOCGWINSZ, &ws) != 0) return 0;
  return ws.ws_col;
}

void BlockTerminalSignals() {
  sigset_t set = TerminalSignals();
  pthread_sigmask(SIG_BLOCK, &set, nullptr);
}

SignalWatcher::SignalWatcher(RawTerminal* terminal, std::function<void()> on_quit,
                             std::function<void()> on_resume) {
  thread_ = std::thread([this, terminal, on_quit = std::move(on_quit),
                         on_resume = std::move(on_resume)] {
    const sigset_t set = TerminalSignals();
    while (true) {
      int sig = 0;
      if (sigwait(&set, &sig) != 0) continue;
      if (sig == SIGUSR1 && stopping_.load()) return;
      if (sig == SIGTSTP) {
        terminal->Restore();
        static constexpr char kNewline[] = "\r\n";
        (void)!write(STDOUT_FILENO, kNewline, sizeof kNewline - 1);
        // SIGSTOP directed at this thread, so this thread stops before its
        // next instruction: with kill(getpid()) another thread may take the
        // signal while this one races on to Enter() before the stop.
        raise(SIGSTOP);
        (void)terminal->Enter();
        on_resume();
      } else if (sig != SIGUSR1) {
        terminal->Restore();
        on_quit();
      }
    }
  });
}

SignalWatcher::~SignalWatcher() {
  stopping_.store(true);
  pthread_kill(thread_.native_handle(), SIGUSR1);
  thread_.join();
}

}  // namespace tickmark::keys

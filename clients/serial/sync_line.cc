#include "clients/serial/sync_line.h"

#include <fcntl.h>
#include <pthread.h>
#include <signal.h>
#include <sys/ioctl.h>
#include <termios.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <chrono>
#include <cstring>

namespace tickmark::serial {
namespace {

std::string Upper(std::string_view s) {
  std::string out(s);
  for (char& c : out) c = static_cast<char>(c >= 'a' && c <= 'z' ? c - 'a' + 'A' : c);
  return out;
}

absl::Status Errno(const std::string& what) {
  return absl::UnavailableError(what + ": " + std::strerror(errno));
}

// SIGUSR2 only interrupts a blocked TIOCMIWAIT (installed without
// SA_RESTART, so the ioctl returns EINTR); it does nothing else.
void OnWake(int) {}
void InstallWakeHandler() {
  static const bool installed = [] {
    struct sigaction sa {};
    sa.sa_handler = OnWake;
    sigemptyset(&sa.sa_mask);
    sa.sa_flags = 0;
    sigaction(SIGUSR2, &sa, nullptr);
    return true;
  }();
  (void)installed;
}

class TtyLines final : public ModemLines {
 public:
  TtyLines(int fd, std::string path) : fd_(fd), path_(std::move(path)) {}
  ~TtyLines() override { close(fd_); }
  absl::Status Set(ModemLine line, bool level) override {
    int bit = ModemLineBit(line);
    if (ioctl(fd_, level ? TIOCMBIS : TIOCMBIC, &bit) != 0) {
      return Errno(std::string(level ? "TIOCMBIS " : "TIOCMBIC ") + path_);
    }
    return absl::OkStatus();
  }
  absl::StatusOr<int> Get() override {
    int bits = 0;
    if (ioctl(fd_, TIOCMGET, &bits) != 0) return Errno("TIOCMGET " + path_);
    return bits;
  }
  absl::Status WaitChange(int mask) override {
    waiter_ = pthread_self();
    waiting_ = true;
    if (interrupted_) {
      waiting_ = false;
      return absl::CancelledError("interrupted");
    }
    const int r = ioctl(fd_, TIOCMIWAIT, mask);
    const int err = errno;
    waiting_ = false;
    if (r == 0) return absl::OkStatus();
    if (err == EINTR && interrupted_) return absl::CancelledError("interrupted");
    if (err == EINTR) return absl::OkStatus();  // another signal: look again
    errno = err;
    return Errno("TIOCMIWAIT " + path_);
  }
  void Interrupt() override {
    interrupted_ = true;
    if (waiting_) pthread_kill(waiter_, SIGUSR2);
  }
  std::string device() const override { return path_; }

 private:
  int fd_;
  std::string path_;
  std::atomic<bool> interrupted_{false};
  std::atomic<bool> waiting_{false};
  pthread_t waiter_{};
};

class SimLines final : public ModemLines {
 public:
  explicit SimLines(std::string device) : device_(std::move(device)) {}
  absl::Status Set(ModemLine line, bool level) override {
    std::lock_guard<std::mutex> l(mu_);
    const int bit = ModemLineBit(line);
    bits_ = level ? (bits_ | bit) : (bits_ & ~bit);
    return absl::OkStatus();
  }
  absl::StatusOr<int> Get() override {
    std::lock_guard<std::mutex> l(mu_);
    return bits_;
  }
  absl::Status WaitChange(int) override {
    std::unique_lock<std::mutex> l(mu_);
    cv_.wait(l, [&] { return interrupted_; });
    return absl::CancelledError("interrupted");
  }
  void Interrupt() override {
    std::lock_guard<std::mutex> l(mu_);
    interrupted_ = true;
    cv_.notify_all();
  }
  std::string device() const override { return device_; }
  bool simulated() const override { return true; }

 private:
  std::string device_;
  std::mutex mu_;
  std::condition_variable cv_;
  int bits_ = 0;
  bool interrupted_ = false;
};

}  // namespace

std::optional<ModemLine> ParseModemLine(std::string_view name) {
  const std::string u = Upper(name);
  if (u == "DTR") return ModemLine::kDtr;
  if (u == "RTS") return ModemLine::kRts;
  if (u == "CTS") return ModemLine::kCts;
  if (u == "DSR") return ModemLine::kDsr;
  if (u == "DCD" || u == "CD" || u == "CAR") return ModemLine::kDcd;
  return std::nullopt;
}

const char* ModemLineName(ModemLine line) {
  switch (line) {
    case ModemLine::kDtr:
      return "DTR";
    case ModemLine::kRts:
      return "RTS";
    case ModemLine::kCts:
      return "CTS";
    case ModemLine::kDsr:
      return "DSR";
    case ModemLine::kDcd:
      return "DCD";
  }
  return "?";
}

bool IsOutputLine(ModemLine line) { return line == ModemLine::kDtr || line == ModemLine::kRts; }

int ModemLineBit(ModemLine line) {
  switch (line) {
    case ModemLine::kDtr:
      return TIOCM_DTR;
    case ModemLine::kRts:
      return TIOCM_RTS;
    case ModemLine::kCts:
      return TIOCM_CTS;
    case ModemLine::kDsr:
      return TIOCM_DSR;
    case ModemLine::kDcd:
      return TIOCM_CAR;
  }
  return 0;
}

absl::StatusOr<std::unique_ptr<ModemLines>> OpenTtyModemLines(const std::string& path) {
  const int fd = open(path.c_str(), O_RDWR | O_NOCTTY | O_NONBLOCK | O_CLOEXEC);
  if (fd < 0) return Errno("open " + path);
  int bits = 0;
  if (ioctl(fd, TIOCMGET, &bits) != 0) {
    const int err = errno;
    close(fd);
    errno = err;
    if (err == ENOTTY || err == EINVAL) {
      return absl::FailedPreconditionError(
          path +
          " has no modem control lines (a pseudo-terminal or not a serial port); "
          "use a serial port or USB-serial adapter, or --sync-simulate to rehearse");
    }
    return Errno("TIOCMGET " + path);
  }
  InstallWakeHandler();
  return std::unique_ptr<ModemLines>(std::make_unique<TtyLines>(fd, path));
}

std::unique_ptr<ModemLines> SimulatedModemLines(std::string device) {
  return std::make_unique<SimLines>(std::move(device));
}

// --- SyncOutEngine ---

SyncOutEngine::SyncOutEngine(SyncOutOptions options, ModemLines* lines,
                             const MonotonicSource* clock)
    : options_(options), lines_(lines), clock_(clock), rng_(options.seed) {}

int64_t SyncOutEngine::NextGap() {
  const double mean = static_cast<double>(options_.interval.nanos());
  const double j = std::clamp(options_.jitter, 0.0, 0.9);
  std::uniform_real_distribution<double> u(1.0 - j, 1.0 + j);
  return static_cast<int64_t>(mean * u(rng_));
}

absl::Status SyncOutEngine::Start() {
  if (absl::Status s = lines_->Set(options_.line, false); !s.ok()) return s;
  level_ = false;
  const int64_t now = clock_->NowNanos();
  earliest_next_ns_ = now;
  next_interval_ns_ = now + NextGap();
  return absl::OkStatus();
}

void SyncOutEngine::QueueMarker(uint64_t marker_sequence) { markers_.push_back(marker_sequence); }

int64_t SyncOutEngine::Due() const {
  if (releasing_) return release_due_ns_;
  if (!markers_.empty()) return earliest_next_ns_;
  return std::max(next_interval_ns_, earliest_next_ns_);
}

absl::StatusOr<SyncEdge> SyncOutEngine::Edge(bool level, SyncEdge::Reason reason, uint64_t index,
                                             uint64_t marker) {
  const int64_t before = clock_->NowNanos();
  absl::Status s = lines_->Set(options_.line, level);
  const int64_t after = clock_->NowNanos();
  if (!s.ok()) return s;
  level_ = level;
  SyncEdge e;
  e.line = options_.line;
  e.out = true;
  e.level = level;
  e.event_ns = before + (after - before) / 2;
  e.half_bracket_ns = (after - before + 1) / 2;
  e.reason = reason;
  e.pulse_index = index;
  e.marker_sequence = marker;
  return e;
}

absl::StatusOr<std::optional<SyncEdge>> SyncOutEngine::Fire() {
  const int64_t now = clock_->NowNanos();
  if (now < Due()) return std::optional<SyncEdge>();
  const int64_t width = options_.width.nanos();
  if (releasing_) {
    auto e = Edge(false, current_reason_, index_, current_marker_);
    if (!e.ok()) return e.status();
    releasing_ = false;
    earliest_next_ns_ = e->event_ns + width;
    return std::optional<SyncEdge>(*e);
  }
  if (!markers_.empty()) {
    current_reason_ = SyncEdge::Reason::kMarker;
    current_marker_ = markers_.front();
    markers_.pop_front();
  } else {
    current_reason_ = SyncEdge::Reason::kInterval;
    current_marker_ = 0;
    next_interval_ns_ = now + NextGap();
  }
  ++index_;
  const bool level = width > 0 ? true : !level_;
  auto e = Edge(level, current_reason_, index_, current_marker_);
  if (!e.ok()) return e.status();
  if (width > 0) {
    releasing_ = true;
    release_due_ns_ = e->event_ns + width;
  } else {
    earliest_next_ns_ = e->event_ns;
  }
  return std::optional<SyncEdge>(*e);
}

absl::StatusOr<std::optional<SyncEdge>> SyncOutEngine::Stop() {
  if (!level_) return std::optional<SyncEdge>();
  auto e = Edge(false, current_reason_, index_, current_marker_);
  if (!e.ok()) return e.status();
  releasing_ = false;
  return std::optional<SyncEdge>(*e);
}

// --- SyncOutRunner ---

SyncOutRunner::SyncOutRunner(SyncOutEngine* engine, EdgeFn on_edge, ErrorFn on_error)
    : engine_(engine), on_edge_(std::move(on_edge)), on_error_(std::move(on_error)) {}

SyncOutRunner::~SyncOutRunner() { Stop(); }

void SyncOutRunner::Start() {
  thread_ = std::thread([this] { Run(); });
}

void SyncOutRunner::QueueMarker(uint64_t marker_sequence) {
  std::lock_guard<std::mutex> l(mu_);
  engine_->QueueMarker(marker_sequence);
  cv_.notify_all();
}

void SyncOutRunner::Stop() {
  {
    std::lock_guard<std::mutex> l(mu_);
    if (stop_ && !thread_.joinable()) return;
    stop_ = true;
    cv_.notify_all();
  }
  if (thread_.joinable()) thread_.join();
}

void SyncOutRunner::Run() {
  std::unique_lock<std::mutex> l(mu_);
  while (!stop_) {
    // The wait's precision does not matter: the edge's time is read around
    // the ioctl, whenever it happens.
    const int64_t wait_ns = engine_->Due() - SystemMonotonic::Get()->NowNanos();
    if (wait_ns > 0) {
      cv_.wait_for(l, std::chrono::nanoseconds(wait_ns));
      continue;
    }
    auto e = engine_->Fire();
    if (!e.ok()) {
      on_error_(e.status());
      cv_.wait_for(l, std::chrono::seconds(1));  // the port may come back
      continue;
    }
    if (e->has_value()) on_edge_(**e);
  }
  auto e = engine_->Stop();
  if (!e.ok()) {
    on_error_(e.status());
  } else if (e->has_value()) {
    on_edge_(**e);
  }
}

// --- SyncInWatcher ---

SyncInWatcher::SyncInWatcher(ModemLines* lines, std::vector<ModemLine> watched,
                             const MonotonicSource* clock, EdgeFn on_edge, ErrorFn on_error)
    : lines_(lines),
      watched_(std::move(watched)),
      clock_(clock),
      on_edge_(std::move(on_edge)),
      on_error_(std::move(on_error)),
      rises_(watched_.size(), 0) {
  for (ModemLine l : watched_) mask_ |= ModemLineBit(l);
}

SyncInWatcher::~SyncInWatcher() { Stop(); }

absl::Status SyncInWatcher::Start() {
  auto bits = lines_->Get();
  if (!bits.ok()) return bits.status();
  last_bits_ = *bits;
  thread_ = std::thread([this] {
    while (!stop_) {
      absl::Status s = Step();
      if (absl::IsCancelled(s)) break;
      if (!s.ok()) {
        on_error_(s);
        for (int i = 0; i < 20 && !stop_; ++i) {
          std::this_thread::sleep_for(std::chrono::milliseconds(50));
        }
      }
    }
    done_ = true;
  });
  return absl::OkStatus();
}

absl::Status SyncInWatcher::Step() {
  if (absl::Status s = lines_->WaitChange(mask_); !s.ok()) return s;
  const int64_t woke = clock_->NowNanos();
  auto bits = lines_->Get();
  const int64_t read = clock_->NowNanos();
  if (!bits.ok()) return bits.status();
  const int changed = (*bits ^ last_bits_) & mask_;
  last_bits_ = *bits;
  for (size_t i = 0; i < watched_.size(); ++i) {
    const int bit = ModemLineBit(watched_[i]);
    if ((changed & bit) == 0) continue;
    SyncEdge e;
    e.line = watched_[i];
    e.out = false;
    e.level = (*bits & bit) != 0;
    if (e.level) ++rises_[i];
    e.event_ns = woke + (read - woke) / 2;
    e.half_bracket_ns = (read - woke + 1) / 2;
    e.reason = SyncEdge::Reason::kExternal;
    e.pulse_index = std::max<uint64_t>(1, rises_[i]);
    on_edge_(e);
  }
  return absl::OkStatus();
}

void SyncInWatcher::Stop() {
  stop_ = true;
  if (!thread_.joinable()) return;
  // TtyLines::Interrupt signals the waiting thread; a signal that lands
  // between its flag check and the ioctl would be lost, so repeat until the
  // thread is out.
  while (!done_) {
    lines_->Interrupt();
    std::this_thread::sleep_for(std::chrono::milliseconds(20));
  }
  thread_.join();
}

}  // namespace tickmark::serial

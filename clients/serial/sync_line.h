// Sync lines shared with other lab recorders (docs/sync.md): a serial
// port's modem control lines driven as a pulse train (--sync-out DTR|RTS)
// or watched for another system's pulses (--sync-in CTS|DSR|DCD).
//
// The ioctls sit behind ModemLines so tests drive the schedule and the
// timing with a fake (pseudo-terminals have no modem lines): TtyModemLines
// is the real port (TIOCMBIS/TIOCMBIC to drive, TIOCMIWAIT + TIOCMGET to
// watch), SimulatedModemLines moves nothing (--sync-simulate).
//
// Every edge is timed by two readings of the injected clock taken right
// before and right after the ioctl: the edge is their middle, give or take
// half their distance (for an output; for an input the reading after the
// wake-up is later than the edge by the driver's and scheduler's latency,
// which no reading can see: docs/sync.md says how large it can be).
#ifndef TICKMARK_CLIENTS_SERIAL_SYNC_LINE_H_
#define TICKMARK_CLIENTS_SERIAL_SYNC_LINE_H_

#include <atomic>
#include <condition_variable>
#include <cstdint>
#include <deque>
#include <functional>
#include <memory>
#include <mutex>
#include <optional>
#include <random>
#include <string>
#include <thread>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "server/core/time.h"

namespace tickmark::serial {

enum class ModemLine { kDtr, kRts, kCts, kDsr, kDcd };

// "DTR" -> kDtr (case-insensitive; CD and CAR are DCD too); nullopt otherwise.
std::optional<ModemLine> ParseModemLine(std::string_view name);
const char* ModemLineName(ModemLine line);
bool IsOutputLine(ModemLine line);  // DTR, RTS
int ModemLineBit(ModemLine line);   // TIOCM_DTR, ...

class ModemLines {
 public:
  virtual ~ModemLines() = default;
  // Asserts (true) or releases (false) an output line.
  virtual absl::Status Set(ModemLine line, bool level) = 0;
  // The TIOCM_* bits of every line now.
  virtual absl::StatusOr<int> Get() = 0;
  // Blocks until one of the TIOCM_* bits in mask changes (TIOCMIWAIT), or
  // Interrupt() is called (CANCELLED).
  virtual absl::Status WaitChange(int mask) = 0;
  // Wakes a WaitChange in progress (from another thread).
  virtual void Interrupt() = 0;
  virtual std::string device() const = 0;
  virtual bool simulated() const { return false; }
};

// A real serial device, opened for its lines only (O_NOCTTY, nothing read).
absl::StatusOr<std::unique_ptr<ModemLines>> OpenTtyModemLines(const std::string& path);
// Moves nothing; Get() reports the levels last Set(); WaitChange blocks
// until Interrupt().
std::unique_ptr<ModemLines> SimulatedModemLines(std::string device);

// One edge, as timed.
struct SyncEdge {
  ModemLine line = ModemLine::kDtr;
  bool out = true;
  bool level = false;    // after the edge
  int64_t event_ns = 0;  // middle of the bracket, on the clock
  int64_t half_bracket_ns = 0;
  enum class Reason { kInterval, kMarker, kExternal } reason = Reason::kInterval;
  uint64_t pulse_index = 0;  // from 1; both edges of a pulse share it
  uint64_t marker_sequence = 0;
};

struct SyncOutOptions {
  ModemLine line = ModemLine::kDtr;
  // Mean time between interval pulses; each gap is drawn uniformly from
  // interval * [1 - jitter, 1 + jitter] so the train has no period (an
  // aligner cannot then slip by whole pulses; docs/sync.md).
  Duration interval = Duration::Seconds(1);
  double jitter = 0.25;
  uint64_t seed = 1;
  // How long the line stays asserted; zero: toggle mode (each pulse is one
  // edge, the level alternating).
  Duration width = Duration::Millis(10);
};

// The pulse train as a pure state machine: Due() says when the next edge is
// wanted, Fire() makes it (driving the line through ModemLines, timing it
// on the clock) and returns it. SyncOutRunner below is the thread that
// sleeps until Due(); tests call Fire() with a fake clock and fake lines.
class SyncOutEngine {
 public:
  SyncOutEngine(SyncOutOptions options, ModemLines* lines, const MonotonicSource* clock);

  // Starts the train: the line is released and the first interval pulse is
  // due one gap from now.
  absl::Status Start();
  // A marker pulse is wanted as soon as the line is free.
  void QueueMarker(uint64_t marker_sequence);
  // The clock time of the next edge.
  int64_t Due() const;
  // Makes the next edge if it is due at `now` or earlier.
  absl::StatusOr<std::optional<SyncEdge>> Fire();
  // Releases the line (end of the run); returns the closing edge if the
  // line was asserted.
  absl::StatusOr<std::optional<SyncEdge>> Stop();

 private:
  int64_t NextGap();
  absl::StatusOr<SyncEdge> Edge(bool level, SyncEdge::Reason reason, uint64_t index,
                                uint64_t marker);

  SyncOutOptions options_;
  ModemLines* lines_;
  const MonotonicSource* clock_;
  std::mt19937_64 rng_;
  bool level_ = false;
  int64_t next_interval_ns_ = 0;
  // Toggle mode, or the falling edge of the pulse in progress.
  int64_t release_due_ns_ = 0;
  bool releasing_ = false;
  SyncEdge::Reason current_reason_ = SyncEdge::Reason::kInterval;
  uint64_t current_marker_ = 0;
  uint64_t index_ = 0;
  std::deque<uint64_t> markers_;
  int64_t earliest_next_ns_ = 0;  // a gap of one width after a release
};

// The thread that runs a SyncOutEngine on the real clock. on_edge is
// called on that thread for every edge (keep it short: send the pulse).
class SyncOutRunner {
 public:
  using EdgeFn = std::function<void(const SyncEdge&)>;
  using ErrorFn = std::function<void(const absl::Status&)>;
  SyncOutRunner(SyncOutEngine* engine, EdgeFn on_edge, ErrorFn on_error);
  ~SyncOutRunner();
  void Start();
  void QueueMarker(uint64_t marker_sequence);
  void Stop();  // releases the line; joins

 private:
  void Run();
  SyncOutEngine* engine_;
  EdgeFn on_edge_;
  ErrorFn on_error_;
  std::mutex mu_;
  std::condition_variable cv_;
  bool stop_ = false;
  std::deque<uint64_t> markers_;
  std::thread thread_;
};

// Watches input lines: every change of a watched line becomes an edge
// (reason external), stamped right after TIOCMIWAIT returned and bracketed
// by the TIOCMGET that reads its level. Pulse index counts rising edges.
class SyncInWatcher {
 public:
  using EdgeFn = std::function<void(const SyncEdge&)>;
  using ErrorFn = std::function<void(const absl::Status&)>;
  SyncInWatcher(ModemLines* lines, std::vector<ModemLine> watched, const MonotonicSource* clock,
                EdgeFn on_edge, ErrorFn on_error);
  ~SyncInWatcher();
  absl::Status Start();  // reads the initial levels, starts the thread
  // One wait-and-read round (the thread's body; tests call it directly).
  absl::Status Step();
  void Stop();

 private:
  ModemLines* lines_;
  std::vector<ModemLine> watched_;
  const MonotonicSource* clock_;
  EdgeFn on_edge_;
  ErrorFn on_error_;
  int mask_ = 0;
  int last_bits_ = 0;
  std::vector<uint64_t> rises_;
  std::atomic<bool> stop_{false};
  std::atomic<bool> done_{false};
  std::thread thread_;
};

}  // namespace tickmark::serial

#endif  // TICKMARK_CLIENTS_SERIAL_SYNC_LINE_H_

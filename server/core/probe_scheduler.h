// When the server probes a client's clock next: adaptive probing
// (docs/time-model.md, "Adaptive probing").
//
// A clock model is only as good as its probes: the offset's asymmetry term
// shrinks with the smallest round trip seen and the drift's error bound with
// the number and span of probes. So a client is probed fast while its model
// is young (fast_interval for fast_for after the model starts or restarts),
// at boost_interval while the model is loose (its offset scatter above
// target_scatter, or no fitted drift, or a drift error bound above
// target_drift_ppm) and younger than boost_within (a link whose model still
// misses its targets then is as good as probing makes it; every probe is
// stored), and at steady_interval otherwise; never closer than
// min_interval (the per-client cap). A probe sooner than the steady rate is
// an extra: Admit asks the caller's server-wide budget for it and, refused,
// puts it off to the steady slot. A steady probe takes a token too; refused
// (more clients than the budget covers at the steady rate), it waits a
// steady interval and asks again, but goes anyway once max_interval has
// passed since the client's last probe. So the server's total probe rate
// stays within the budget plus one probe per client per max_interval, and a
// server with many clients probes each less often instead of spending its
// cores on probes. With adaptive off: a burst of `burst` probes
// burst_interval apart, then steady_interval.
//
// Pure logic: every time is a Duration since the stream began, given by the
// caller. Not thread-safe; one per stream, owned by its reactor (or a
// benchmark's simulated client).
#ifndef TICKMARK_SERVER_CORE_PROBE_SCHEDULER_H_
#define TICKMARK_SERVER_CORE_PROBE_SCHEDULER_H_

#include <functional>

#include "server/core/clock_model.h"
#include "server/core/time.h"

namespace tickmark {

class ProbeScheduler {
 public:
  struct Options {
    bool adaptive = true;                             // else burst, then steady
    Duration steady_interval = Duration::Seconds(1);  // a settled model's period
    int burst = 8;                                    // (adaptive off) probes after the start
    Duration burst_interval = Duration::Millis(50);   // (adaptive off) between burst probes
    Duration fast_for = Duration::Seconds(10);        // fast this long after a (re)start
    Duration fast_interval = Duration::Millis(50);    // while fast (20 probes/s)
    Duration boost_interval = Duration::Millis(100);  // while the model is loose
    Duration boost_within = Duration::Seconds(120);   // ... and this young at most
    Duration target_scatter = Duration::Micros(500);  // loose above this offset scatter
    double target_drift_ppm = 10;                     // loose above this drift error bound
    Duration min_interval = Duration::Millis(50);     // per-client cap: never closer
    // A steady probe refused a token waits, but never past this since the
    // last probe (>= steady_interval).
    Duration max_interval = Duration::Seconds(5);
  };

  // How the next probe was paced.
  enum class Pace { kBurst, kFast, kBoost, kSteady };

  ProbeScheduler() : ProbeScheduler(Options{}) {}
  explicit ProbeScheduler(Options o);

  // The client's clock model (re)started at `at` (the hello, or a clock
  // jump): probe now, and fast (or a burst) again.
  void Restart(Duration at);

  // A probe is due at `at` (at ≥ due()). True if it may go now. Every probe
  // calls take_token() once (the server-wide budget). When it returns false
  // an extra probe, one sooner than the steady rate allows, is refused and
  // due() moves to the steady slot; a steady probe is refused too and due()
  // moves a steady interval on, unless max_interval has passed since the
  // last probe (then it goes). The first probe always goes.
  bool Admit(Duration at, const std::function<bool()>& take_token);

  // A probe went out at `at`; `model` is the client's model as it stands.
  // Returns when the next probe is due (also due()).
  Duration Sent(Duration at, const ClockEstimate& model);

  // When the next probe is due.
  Duration due() const { return due_; }
  // How the pending probe was paced (kSteady after a refused extra).
  Pace pace() const { return pace_; }
  // True if the model falls short of the targets (see the file comment).
  bool Loose(const ClockEstimate& model) const;

 private:
  Options options_;
  Duration started_;       // the model's last (re)start
  Duration last_sent_;     // the last probe out; valid when any_sent_
  bool any_sent_ = false;  // since the last Restart
  int sent_since_start_ = 0;
  Duration due_;
  Pace pace_ = Pace::kFast;
};

// Stable lower-case name, e.g. "boost", for logs and benchmarks.
const char* ProbePaceName(ProbeScheduler::Pace p);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_PROBE_SCHEDULER_H_

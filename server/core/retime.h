// After-the-fact retiming (docs/time-model.md, "Retiming"): the session time of
// a client's events recomputed once all of the client's probes are known, with
// probes on both sides of each event.
//
// While a session runs, an event can only be mapped with the probes that came
// before it: the clock model extrapolates from its newest probes, and its
// stated uncertainty grows with the distance. Afterwards the ledger holds
// every probe, so each event can be bounded by probes before and after it.
//
// The bound. Let θ(s) be the client clock minus session time at session time
// s. Every accepted probe gives two inequalities that need nothing but
// non-negative one-way delays (RFC 5905 §8 timestamps, roles as in
// clock_model.h; stamping late only loosens them):
//   forward   T2 − T1 = θ(T1) + d_f·(1 + rate error)  ≥ θ(T1)
//   backward  T4 − T3 = d_b·(1 + rate error) − θ(T4)  ≥ −θ(T4)
// Over a window of probes centred on the event at session time x, the client's
// clock runs at a nearly constant rate: θ(t) = θ(x) + r·(t − x) + w(t), where
// |r| ≤ max_drift_ppm and the wander |w(t)| ≤ ½·a·(t − x)² when the rate changes
// by at most a (wander_ppm_per_s) per second. The pairs (θ(x), r) consistent
// with every inequality of the window form a convex polygon (a two-variable
// linear program; only the convex hulls of the two one-way series bind, which
// are the lower envelopes of Moon, Skelly & Towsley, INFOCOM 1999). Its extent
// along θ(x) is an interval that holds the truth whenever the assumptions do:
// the estimate is its middle, the uncertainty its half-width. Within the span
// of the probes that interval is at most half the round-trip delay the
// envelopes leave at x (the δ/2 asymmetry bound no round trip can beat); beyond
// it (an event before the first probe) it widens with the drift bound.
//
// Segments. A client clock is only continuous between clock jumps: probes
// marked `restart` (the live model restarted there; the rejected candidate
// that its confirmation agreed with, passed as `candidate`, opens the new
// segment) and confirmed jumps found here (two probes in a row that disagree
// with the one before like a jump) start a new segment. An event belongs to
// the segment of the last probe recorded before it (ledger order); one
// recorded between the last probe of a segment and the first of the next
// may have been stamped on either side of the jump, so it takes the segment
// that puts it closest before its arrival (a jump is at least
// jump_threshold, events arrive within moments). A segment with fewer than
// min_probes probes keeps its events' live times, as does one whose probes
// contradict each other in every window (timestamps that no constant-rate
// clock could produce).
//
// Pure logic, no I/O; thread-compatible (free functions on values).
#ifndef TICKMARK_SERVER_CORE_RETIME_H_
#define TICKMARK_SERVER_CORE_RETIME_H_

#include <cstddef>
#include <span>
#include <string>
#include <vector>

#include "server/core/clock_model.h"
#include "server/core/time.h"

namespace tickmark {

struct RetimeOptions {
  // Probes whose session midpoint lies within ±half_window of the event bound
  // it; the window doubles (up to max_half_window) until it holds
  // window_probes probes.
  Duration half_window = Duration::Seconds(30);
  Duration max_half_window = Duration::Seconds(600);
  int window_probes = 16;
  // A segment with fewer accepted probes keeps its events' live times.
  int min_probes = 3;
  // Bound on the client's rate error, as ClockModel::Options::max_drift_ppm.
  double max_drift_ppm = 500;
  // How fast the client's rate may change, ppm per second. An assumption (no
  // source): generous for a crystal oscillator at room temperature and for the
  // frequency corrections of a time daemon slewing the client's clock.
  double wander_ppm_per_s = 0.05;
  // Allowance for timestamp resolution and rounding, per inequality (the
  // clock model's precision, RFC 5905 §8).
  Duration precision = Duration::Micros(1);
  // Two probes in a row whose offsets differ from the previous probe's by
  // more than this plus their delays and the drift bound over the gap are a
  // clock jump (ClockModel::Options::jump_threshold).
  Duration jump_threshold = Duration::Millis(500);
};

// One accepted probe of a client, in ledger order.
struct RetimeProbe {
  ProbeTimestamps t;
  // The live clock model restarted at this probe (a confirmed clock jump):
  // it starts a new segment.
  bool restart = false;
  // Rejected live as an unconfirmed jump: used only as the first probe of
  // the segment that the next probe starts, when it agrees with it.
  bool candidate = false;
};

// One event time of the client: a feedback's event, a step's start or end.
struct RetimeEvent {
  ClientTime client;          // the client's reading
  SessionTime live;           // where the live model put it
  Duration live_uncertainty;  // and the uncertainty it stated
  // How many of the client's probes (the span passed to RetimeClock) were
  // recorded before this event; picks the event's segment.
  size_t probes_before = 0;
  // When the server received it; decides between two segments for an event
  // recorded at a jump (zero: unknown, the earlier segment is taken).
  SessionTime arrival;
};

enum class RetimeOutcome {
  kRetimed,       // bounded by the probes around it
  kNoProbes,      // no probe in its segment: live time kept
  kFewProbes,     // fewer than min_probes in its segment: live time kept
  kInconsistent,  // the probes contradict a constant-rate clock: live time kept
};

// Stable name for the ledger: "retimed", "no_probes", "few_probes",
// "inconsistent_probes".
const char* RetimeOutcomeName(RetimeOutcome outcome);

struct RetimedTime {
  SessionTime session;
  Duration uncertainty;  // half-width; holds the truth under the assumptions above
  RetimeOutcome outcome = RetimeOutcome::kRetimed;
  int probes = 0;  // probes in the window that bounded it (0 when kept)
};

// The first probe index of each segment of `probes` (empty for no probes;
// else starts with 0): restarts and confirmed jumps.
std::vector<size_t> RetimeSegments(std::span<const RetimeProbe> probes,
                                   const RetimeOptions& options = {});

// Retimes every event of one client clock (one connection of one client):
// one result per event, in the events' order. Deterministic; events with the
// same client reading in the same segment get the same time.
std::vector<RetimedTime> RetimeClock(std::span<const RetimeProbe> probes,
                                     std::span<const RetimeEvent> events,
                                     const RetimeOptions& options = {});

// The options as text for a time set's record, e.g. {"half_window_s":30,...}
// (numbers only, so valid JSON).
std::string DescribeRetimeOptions(const RetimeOptions& options);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_RETIME_H_

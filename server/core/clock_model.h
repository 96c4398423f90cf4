// Clock models: mapping one client's clock to session time (docs/architecture.md §4).
//
// The server starts every probe, so it plays the requester ("client") role of
// RFC 5905 §8 and the device plays the responder ("server") role:
//   T1  session time when the server sends the probe
//   T2  client clock when the device receives it
//   T3  client clock when the device sends the reply
//   T4  session time when the server receives the reply
// With these roles the §8 formulas give
//   offset θ = ((T2 − T1) + (T3 − T4)) / 2   = client clock − session time
//   delay  δ = (T4 − T1) − (T3 − T2)          = round trip minus the device's
//   hold
// and θ is exact when the two one-way delays are equal; otherwise it is off by
// (forward − backward)/2, which no measurement can reveal, so every estimate
// carries an uncertainty of at least δ/2.
//
// ClockModel keeps the accepted probes of one client, picks the minimum-delay
// probe of the most recent ones (RFC 5905 §10 clock filter) for the offset,
// fits the client's rate error (drift) from the lower envelopes of the two
// one-way series (Moon, Skelly & Towsley, INFOCOM 1999) with a bound on the
// fit's own error, states an uncertainty meant to hold (asymmetry + offset
// scatter + growth at PHI + the drift's error bound or a prior), and detects
// clock steps of the device ("jumps"), after which it starts again.
// docs/time-model.md explains the model for newcomers.
//
// Pure logic, no I/O. ClockModel is a value type; thread-compatible (callers
// serialise access to one instance, const methods may run concurrently).
#ifndef TICKMARK_SERVER_CORE_CLOCK_MODEL_H_
#define TICKMARK_SERVER_CORE_CLOCK_MODEL_H_

#include <deque>
#include <optional>
#include <span>

#include "server/core/time.h"

namespace tickmark {

// The four timestamps of one probe, roles as in the file comment.
struct ProbeTimestamps {
  SessionTime t1;  // server sends
  ClientTime t2;   // client receives
  ClientTime t3;   // client replies
  SessionTime t4;  // server receives
};

// The RFC 5905 §8 result of one probe.
struct OnWire {
  Duration offset;  // client clock − session time
  Duration delay;   // round-trip delay; may be negative before clamping
};

// RFC 5905 §8 on-wire formulas in 64-bit first-order differences. The delay is
// returned as computed (not clamped); ClockModel applies the §8 clamp.
// nullopt when a difference or the result does not fit in int64 (the
// timestamps come from outside and may be anything).
std::optional<OnWire> CheckedOnWire(const ProbeTimestamps& p);

// CheckedOnWire, or for timestamps it cannot represent the same formulas
// with saturating arithmetic (defined, but meaningless: for logging what a
// rejected probe claimed, never for a model).
OnWire ComputeOnWire(const ProbeTimestamps& p);

// What ClockModel::AddProbe made of a probe. Every kRejected* leaves the
// model exactly as it was; ProbeVerdictName is the reason to record.
enum class ProbeVerdict {
  kAccepted,
  kRejectedReversed,       // T3 < T2 or T4 < T1: timestamps cannot be right
  kRejectedNegativeDelay,  // δ < −precision: the timestamps contradict
  kClockJump,              // accepted; the client clock stepped, so restarted
  // A difference of the timestamps overflows int64, or the offset is beyond
  // Options::max_abs_offset: no real clock pair gives such a probe.
  kRejectedOutOfRange,
  // Disagrees with the model like a clock jump, but one probe is not enough
  // to restart: held as a candidate until the next probe confirms it.
  kRejectedUnconfirmedJump,
};

// Stable lower-case name, e.g. "rejected_reversed", for logs and the ledger.
const char* ProbeVerdictName(ProbeVerdict v);

// Snapshot of a model, what the server writes to the ledger on every update.
// Mapping: session(t) = (reference − offset) + (t − reference) / (1 + drift).
// Uncertainty at client time t (ClockModel::UncertaintyAt):
//   asymmetry + offset_scatter + |t − reference|·(PHI + drift_error_ppm).
struct ClockEstimate {
  // Client clock − session time, at `reference`.
  Duration offset;
  // Client rate error: (client rate / session rate − 1)·1e6. 0 until a
  // fitted drift's error bound beats the prior (drift_fitted).
  double drift_ppm = 0;
  // Client time the offset refers to: the chosen probe's (T2+T3)/2, or the
  // newest probe's midpoint when the offset comes from the envelopes.
  ClientTime reference;
  Duration uncertainty;  // UncertaintyAt(reference) = asymmetry + offset_scatter
  Duration min_delay;    // delay of the chosen (minimum-delay) probe, clamped
  int samples = 0;       // accepted probes held since the last (re)start
  // δ/2 of the round trip the offset was read from: bounds the path
  // asymmetry no measurement can see (RFC 5905 §8).
  Duration asymmetry;
  // How far the offset estimate can be off beyond the asymmetry (the
  // envelope lines' possible dip below the true delay floor); 0 for an
  // offset read from one probe.
  Duration offset_scatter;
  // Bound on |drift_ppm − true drift|: the fitted drift's own error bound
  // once drift_fitted, else the prior (Options::drift_prior_ppm).
  double drift_error_ppm = 0;
  bool drift_fitted = false;  // drift_ppm is a fitted estimate in use

  bool operator==(const ClockEstimate&) const = default;
};

class ClockModel {
 public:
  struct Options {
    // Clamp δ to no less than this; reject probes with δ below −precision
    // (RFC 5905 §8).
    Duration precision = Duration::Micros(1);
    // Clock filter length: the offset comes from the minimum-delay probe of
    // the last filter_stages accepted probes (RFC 5905 §10).
    int filter_stages = 8;
    // A probe whose offset differs from the prediction by more than
    // jump_threshold + its delay + the model's uncertainty there is a jump.
    Duration jump_threshold = Duration::Millis(500);
    // Probes older than this (by T4, relative to the newest) leave the drift
    // fit; the last filter_stages probes are always kept.
    Duration drift_window = Duration::Seconds(600);
    // Drift estimates are clamped to ±max_drift_ppm; the true drift is assumed
    // to be within this bound too.
    double max_drift_ppm = 500;
    // The lower envelopes are fitted once the held probes span this much
    // session time and number at least min_envelope_samples; before that
    // the offset comes from the clock filter alone.
    Duration min_drift_span = Duration::Seconds(2);
    int min_envelope_samples = 16;
    // Assumed bound on the true |drift| while no fitted drift is trusted: the
    // drift is taken as 0 and this goes into the uncertainty's growth. A
    // fitted drift is used once its own error bound is below this. 100 ppm
    // covers common crystal oscillators (common practice, no source).
    double drift_prior_ppm = 100;
    // Chance that a slope error bound (EnvelopeSlopeErrorBound) is exceeded,
    // per envelope and side.
    double slope_bound_miss = 1e-4;
    // Probes whose offset (client clock − session time) is larger than this
    // are impossible. 2^62 ns (about 146 years) keeps the client readings
    // the model works with inside int64 with room to spare, since session
    // times are UTC nanoseconds (about 1.8e18 today, below 2^61 until 2043);
    // a client clock counting from boot sits about −56 years off.
    Duration max_abs_offset = Duration::Nanos(int64_t{1} << 62);
  };

  // RFC 5905 §9.2: dispersion grows at PHI = 15 ppm, the assumed frequency
  // tolerance; our uncertainty grows at PHI plus the drift fit's error.
  static constexpr double kPhiPpm = 15;

  ClockModel() : ClockModel(Options{}) {}
  explicit ClockModel(Options o);

  // Judges one probe and, unless rejected, adds it. A rejected probe leaves
  // the model unchanged. A probe that disagrees with a ready model like a
  // clock jump is held back (kRejectedUnconfirmedJump); if the next probe
  // agrees with it (within jump_threshold plus both delays) the model
  // restarts from the two (kClockJump), so one absurd probe never moves it.
  ProbeVerdict AddProbe(const ProbeTimestamps& p);

  // True once at least one probe was accepted.
  bool ready() const { return !history_.empty(); }

  // Best estimate of the session time of client reading t. Before ready()
  // returns t's nanoseconds unchanged (offset 0).
  SessionTime ToSession(ClientTime t) const;

  // Half-width of the interval that holds the true session time of t:
  //   asymmetry + offset scatter + |t − reference|·(PHI + drift error)
  // (ClockEstimate names the terms; docs/time-model.md derives them). The
  // drift error is the fitted drift's error bound once it beats
  // drift_prior_ppm, the prior until then.
  // Duration::Max() before ready(); saturates at Duration::Max().
  Duration UncertaintyAt(ClientTime t) const;

  // Snapshot; all zero before ready().
  ClockEstimate estimate() const;

 private:
  struct Sample {
    ProbeTimestamps t;
    OnWire w;  // delay already clamped to precision
  };

  // Recomputes the filter choice and the drift fit after history_ changed.
  void Refit();
  // True if `w` (a probe at client time mid_client) disagrees with the model
  // by more than the jump threshold plus what delay and uncertainty explain.
  bool LooksLikeJump(ClientTime mid_client, const OnWire& w) const;

  Options options_;
  std::deque<Sample> history_;  // accepted probes, oldest first
  std::optional<Sample> jump_candidate_;  // a suspected jump awaiting confirmation
  // Cached by Refit(), valid when ready():
  // The reference point: the chosen probe's midpoints, or the newest
  // probe's once the envelopes give the offset.
  SessionTime ref_session_;    // session midpoint (T1+T4)/2
  ClientTime ref_client_;      // client midpoint (T2+T3)/2
  Duration offset_;            // ref_client_ − ref_session_
  Duration min_delay_;         // the chosen probe's (clamped) delay
  Duration asymmetry_;         // ClockEstimate::asymmetry
  Duration scatter_;           // ClockEstimate::offset_scatter
  double drift_ = 0;           // rate error in use, as a fraction (80 ppm -> 80e-6)
  double drift_error_ = 0;     // its error bound, as a fraction; see UncertaintyAt()
  bool drift_fitted_ = false;  // drift_ is fitted (else 0 under the prior)
};

// RFC 5905 §10-style clock filter: the minimum-delay sample. Samples are
// ordered oldest first; on a tie the most recent wins. Returns
// {Zero, Duration::Max()} for an empty span.
OnWire MinDelaySample(std::span<const OnWire> samples);

struct Line {
  double slope = 0;
  double intercept = 0;
};

// Lower-envelope line fit (Moon, Skelly & Towsley, INFOCOM 1999): the line
// y = slope·x + intercept lying on or below every (x[i], y[i]) that minimises
// the summed vertical gaps. Solved exactly: the objective equals n times the
// gap at the mean x, so the optimum is the lower convex hull's edge over the
// mean x; if the mean x falls on a hull vertex both neighbouring edges are
// optimal and the mean of their slopes (also optimal) is returned. With one
// distinct x the result is the flat line through the lowest point. x and y
// must have equal sizes (extra elements of the longer are ignored); returns
// {0, 0} when empty. Callers should centre x and y first for precision.
Line LowerEnvelopeFit(std::span<const double> x, std::span<const double> y);

// Bounds on the error of fit = LowerEnvelopeFit(x, y), each exceeded with
// probability at most `miss` when the points' heights above the true floor
// line are independent draws from one distribution (one-way delays over a
// fixed minimum). Why they hold: the fit is the lower hull's edge over the
// mean x̄ and the hull lies on or above the floor line, so fit − floor is
// ≥ 0 at x̄ and, at every point, ≤ the point's gap g above the floor. A
// slope too steep by σ therefore needs g_j ≥ σ·(x_j − x̄) for every point
// right of x̄: probability Π(1 − F(σ·Δ_j)) ≤ exp(−Σ F(σ·Δ_j)), F the gap
// distribution; too shallow, the same on the left. Each bound is the
// smallest σ at which that is ≤ miss, with F estimated by the residuals
// above the fit (the points the fit touches left out). Infinity when the
// points cannot bound that side (too few, or none on it).
struct SlopeErrorBound {
  double steep = 0;    // fit.slope − true slope ≤ steep
  double shallow = 0;  // true slope − fit.slope ≤ shallow
  double either() const { return steep > shallow ? steep : shallow; }
};
SlopeErrorBound EnvelopeSlopeErrorBound(std::span<const double> x, std::span<const double> y,
                                        Line fit, double miss);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_CLOCK_MODEL_H_

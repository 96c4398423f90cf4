#include "server/core/clock_model.h"

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <functional>
#include <limits>
#include <numeric>
#include <optional>
#include <vector>

namespace tickmark {
namespace {

// Raw nanosecond difference between readings of two different clocks; only
// first-order differences like this are ever taken (RFC 5905 §8). Saturates;
// for accepted probes CheckedOnWire has shown that it fits.
int64_t Diff(ClientTime c, SessionTime s) {
  return time_internal::SaturatingSub(c.nanos(), s.nanos());
}

// A wide intermediate clamped back into int64.
int64_t ClampToInt64(__int128 v) {
  if (v > time_internal::kMaxNs) return time_internal::kMaxNs;
  if (v < time_internal::kMinNs) return time_internal::kMinNs;
  return static_cast<int64_t>(v);
}

// Duration from a double count of nanoseconds, saturating at ±Max.
Duration SaturatingNanos(double ns) {
  constexpr double kLimit = 9.2e18;  // just below INT64_MAX
  if (!(ns < kLimit)) return Duration::Max();
  if (ns <= -kLimit) return -Duration::Max();
  return Duration::Nanos(std::llround(ns));
}

// Index of the minimum-delay element; later elements win ties so the filter
// prefers the fresher of two equally good samples.
template <typename GetDelay>
size_t MinDelayIndex(size_t begin, size_t end, GetDelay delay_of) {
  size_t best = begin;
  for (size_t i = begin; i < end; ++i) {
    if (delay_of(i) <= delay_of(best)) best = i;
  }
  return best;
}

}  // namespace

std::optional<OnWire> CheckedOnWire(const ProbeTimestamps& p) {
  using time_internal::CheckedSub;
  // Roles: the server is the RFC's requester, the device its responder, so
  // the RFC's θ (responder clock − requester clock) is client − session.
  int64_t forward = 0, backward = 0, round_trip = 0, hold = 0, delay = 0;
  if (!CheckedSub(p.t2.nanos(), p.t1.nanos(), &forward) ||      // T2 − T1
      !CheckedSub(p.t3.nanos(), p.t4.nanos(), &backward) ||     // T3 − T4
      !CheckedSub(p.t4.nanos(), p.t1.nanos(), &round_trip) ||   // T4 − T1
      !CheckedSub(p.t3.nanos(), p.t2.nanos(), &hold) ||         // T3 − T2
      !CheckedSub(round_trip, hold, &delay)) {
    return std::nullopt;
  }
  // The mean of two int64 values always fits; their sum may not.
  const __int128 sum = static_cast<__int128>(forward) + backward;
  return OnWire{Duration::Nanos(static_cast<int64_t>(sum / 2)), Duration::Nanos(delay)};
}

OnWire ComputeOnWire(const ProbeTimestamps& p) {
  if (std::optional<OnWire> w = CheckedOnWire(p)) return *w;
  const __int128 sum = static_cast<__int128>(Diff(p.t2, p.t1)) + Diff(p.t3, p.t4);
  return OnWire{Duration::Nanos(ClampToInt64(sum / 2)), (p.t4 - p.t1) - (p.t3 - p.t2)};
}

const char* ProbeVerdictName(ProbeVerdict v) {
  switch (v) {
    case ProbeVerdict::kAccepted:
      return "accepted";
    case ProbeVerdict::kRejectedReversed:
      return "rejected_reversed";
    case ProbeVerdict::kRejectedNegativeDelay:
      return "rejected_negative_delay";
    case ProbeVerdict::kClockJump:
      return "clock_jump";
    case ProbeVerdict::kRejectedOutOfRange:
      return "rejected_out_of_range";
    case ProbeVerdict::kRejectedUnconfirmedJump:
      return "rejected_unconfirmed_jump";
  }
  return "unknown";
}

OnWire MinDelaySample(std::span<const OnWire> samples) {
  if (samples.empty()) return OnWire{Duration::Zero(), Duration::Max()};
  return samples[MinDelayIndex(0, samples.size(),
                               [&](size_t i) { return samples[i].delay; })];
}

Line LowerEnvelopeFit(std::span<const double> x, std::span<const double> y) {
  const size_t n = std::min(x.size(), y.size());
  if (n == 0) return Line{};

  std::vector<size_t> order(n);
  std::iota(order.begin(), order.end(), size_t{0});
  // Probes arrive in time order: strictly increasing x needs no sort.
  const auto x_end = x.begin() + static_cast<std::ptrdiff_t>(n);
  if (std::adjacent_find(x.begin(), x_end, std::greater_equal<double>()) != x_end) {
    std::sort(order.begin(), order.end(),
              [&](size_t a, size_t b) { return x[a] != x[b] ? x[a] < x[b] : y[a] < y[b]; });
  }

  // Andrew's monotone chain, lower half. Of several points with the same x
  // only the lowest (first after sorting) can touch the envelope.
  struct P {
    double x, y;
  };
  std::vector<P> hull;
  for (size_t k = 0; k < n; ++k) {
    const P p{x[order[k]], y[order[k]]};
    if (!hull.empty() && hull.back().x == p.x) continue;
    while (hull.size() >= 2) {
      const P& o = hull[hull.size() - 2];
      const P& a = hull.back();
      const double cross =
          (a.x - o.x) * (p.y - o.y) - (a.y - o.y) * (p.x - o.x);
      if (cross > 0) break;  // strictly convex turn: a stays
      hull.pop_back();
    }
    hull.push_back(p);
  }
  if (hull.size() == 1) return Line{0, hull[0].y};

  double mean_x = 0;
  for (size_t i = 0; i < n; ++i) mean_x += x[i];
  mean_x /= static_cast<double>(n);

  auto edge_slope = [&](size_t i) {
    return (hull[i + 1].y - hull[i].y) / (hull[i + 1].x - hull[i].x);
  };
  const size_t last_edge = hull.size() - 2;
  size_t e = 0;
  while (e < last_edge && hull[e + 1].x < mean_x) ++e;
  if (e < last_edge && hull[e + 1].x == mean_x) {
    // The mean sits on a vertex: every line through it between the two edge
    // slopes is optimal (the optimal set of a linear program is convex).
    const double slope = 0.5 * (edge_slope(e) + edge_slope(e + 1));
    return Line{slope, hull[e + 1].y - slope * hull[e + 1].x};
  }
  const double slope = edge_slope(e);
  return Line{slope, hull[e].y - slope * hull[e].x};
}

SlopeErrorBound EnvelopeSlopeErrorBound(std::span<const double> x, std::span<const double> y,
                                        Line fit, double miss) {
  constexpr double kInfinity = std::numeric_limits<double>::infinity();
  const size_t n = std::min(x.size(), y.size());
  if (n < 3 || !(miss > 0) || !(miss < 1)) return SlopeErrorBound{kInfinity, kInfinity};
  double mean_x = 0;
  for (size_t i = 0; i < n; ++i) mean_x += x[i];
  mean_x /= static_cast<double>(n);

  // Residuals above the fit. The points the fit touches sit at 0 by
  // construction, not by chance, so they are left out of F's estimate.
  double scale = 0;
  for (size_t i = 0; i < n; ++i) scale = std::max(scale, std::abs(y[i]));
  const double touch = 1e-12 * std::max(scale, 1.0);
  std::vector<double> residuals;
  residuals.reserve(n);
  for (size_t i = 0; i < n; ++i) {
    const double r = y[i] - (fit.slope * x[i] + fit.intercept);
    if (r > touch) residuals.push_back(r);
  }
  std::vector<double> right, left;  // distances from the mean x, ascending
  for (size_t i = 0; i < n; ++i) {
    if (x[i] > mean_x) right.push_back(x[i] - mean_x);
    if (x[i] < mean_x) left.push_back(mean_x - x[i]);
  }
  // Probes come in time order, so usually only `left` needs turning round.
  if (!std::is_sorted(right.begin(), right.end())) std::sort(right.begin(), right.end());
  std::reverse(left.begin(), left.end());
  if (!std::is_sorted(left.begin(), left.end())) std::sort(left.begin(), left.end());

  // n·Σ_j F̂(σ·Δ_j) = the number of pairs (residual r, distance Δ) with
  // r < σ·Δ; two pointers count them in one pass over `low`, the smallest
  // residuals in ascending order.
  const double need = std::log(1 / miss) * static_cast<double>(n);
  auto enough = [&](const std::vector<double>& deltas, std::span<const double> low, double sigma) {
    double pairs = 0;
    size_t below = 0;
    for (double d : deltas) {
      while (below < low.size() && low[below] < sigma * d) ++below;
      pairs += static_cast<double>(below);
      if (pairs >= need) return true;
    }
    return false;
  };
  auto side = [&](const std::vector<double>& deltas, std::span<const double> low) {
    // A slope error is a rate: beyond 1 (1e6 ppm) nothing is bounded.
    constexpr double kHi = 1.0, kLo = 1e-15;
    if (deltas.empty() || !enough(deltas, low, kHi)) return kInfinity;
    if (enough(deltas, low, kLo)) return kLo;
    double lo = std::log(kLo), hi = std::log(kHi);
    // 16 halvings of the 35-nat log range: the result is at most 0.06 %
    // above the exact σ.
    for (int k = 0; k < 16; ++k) {
      const double mid = 0.5 * (lo + hi);
      (enough(deltas, low, std::exp(mid)) ? hi : lo) = mid;
    }
    return std::exp(hi);  // the upper end: never below the exact solution
  };
  // Only residuals below σ·Δ_max count, a few dozen of hundreds, so the
  // search starts with the k smallest. Leaving residuals out only lowers a
  // count, so each σ found is an upper bound, and the exact one when no
  // residual left out lies below σ·Δ_max; otherwise k grows.
  // Too steep shows against the points right of the mean, too shallow
  // against those left of it.
  size_t k = std::min(residuals.size(), size_t{64});
  for (;;) {
    if (k < residuals.size()) {
      std::nth_element(residuals.begin(), residuals.begin() + static_cast<std::ptrdiff_t>(k),
                       residuals.end());
    }
    std::sort(residuals.begin(), residuals.begin() + static_cast<std::ptrdiff_t>(k));
    const std::span<const double> low(residuals.data(), k);
    const SlopeErrorBound b{side(right, low), side(left, low)};
    if (k == residuals.size()) return b;
    const double next = residuals[k];  // no residual left out is smaller
    auto exact = [&](double sigma, const std::vector<double>& deltas) {
      return deltas.empty() || sigma * deltas.back() <= next;
    };
    if (exact(b.steep, right) && exact(b.shallow, left)) return b;
    k = std::min(residuals.size(), 4 * k);
  }
}

ClockModel::ClockModel(Options o) : options_(o) {
  options_.filter_stages = std::max(options_.filter_stages, 1);
  options_.max_drift_ppm = std::max(options_.max_drift_ppm, 0.0);
  options_.drift_prior_ppm = std::max(options_.drift_prior_ppm, 0.0);
  options_.min_envelope_samples = std::max(options_.min_envelope_samples, 3);
}

ProbeVerdict ClockModel::AddProbe(const ProbeTimestamps& p) {
  if (p.t3 < p.t2 || p.t4 < p.t1) return ProbeVerdict::kRejectedReversed;
  // Timestamps from outside may be anything: a difference that does not
  // fit, or an offset no pair of real clocks has, is refused before any of
  // it reaches the model.
  std::optional<OnWire> checked = CheckedOnWire(p);
  if (!checked || Abs(checked->offset) > options_.max_abs_offset) {
    return ProbeVerdict::kRejectedOutOfRange;
  }
  OnWire w = *checked;
  // RFC 5905 §8: a slightly negative δ comes from frequency error over the
  // exchange and is clamped; one beyond the precision means the timestamps
  // contradict each other.
  if (w.delay < -options_.precision) {
    return ProbeVerdict::kRejectedNegativeDelay;
  }
  w.delay = std::max(w.delay, options_.precision);
  const Sample sample{p, w};

  ProbeVerdict verdict = ProbeVerdict::kAccepted;
  const ClientTime mid_client = p.t2 + (p.t3 - p.t2) / 2;
  if (ready() && LooksLikeJump(mid_client, w)) {
    // A real step of the device's clock shows in every probe after it; a
    // corrupt or hostile reply shows once. Restart only when two probes in
    // a row agree on the new offset.
    const bool confirms = [&] {
      if (!jump_candidate_) return false;
      const Sample& c = *jump_candidate_;
      const Duration apart = Abs(p.t4 - c.t.t4);
      const Duration drift_allowance = Duration::FromSeconds(
          apart.seconds() * 2 * options_.max_drift_ppm * 1e-6);
      return Abs(w.offset - c.w.offset) <=
             options_.jump_threshold + w.delay + c.w.delay + drift_allowance;
    }();
    if (!confirms) {
      jump_candidate_ = sample;
      return ProbeVerdict::kRejectedUnconfirmedJump;
    }
    history_.clear();
    history_.push_back(*jump_candidate_);
    verdict = ProbeVerdict::kClockJump;
  }
  jump_candidate_.reset();

  history_.push_back(sample);
  const size_t keep = static_cast<size_t>(options_.filter_stages);
  while (history_.size() > keep &&
         history_.back().t.t4 - history_.front().t.t4 > options_.drift_window) {
    history_.pop_front();
  }
  Refit();
  return verdict;
}

bool ClockModel::LooksLikeJump(ClientTime mid_client, const OnWire& w) const {
  const SessionTime mid_session =
      SessionTime::FromNanos(time_internal::SaturatingSub(mid_client.nanos(), w.offset.nanos()));
  const Duration miss = Abs(ToSession(mid_client) - mid_session);
  // Saturates: with an unbounded uncertainty nothing is a jump.
  const Duration allowed = options_.jump_threshold + w.delay + UncertaintyAt(mid_client);
  return miss > allowed;
}

void ClockModel::Refit() {
  const size_t n = history_.size();
  const size_t stages = static_cast<size_t>(options_.filter_stages);
  const size_t chosen =
      MinDelayIndex(n > stages ? n - stages : 0, n,
                    [&](size_t i) { return history_[i].w.delay; });
  const Sample& c = history_[chosen];
  ref_client_ = c.t.t2 + (c.t.t3 - c.t.t2) / 2;
  offset_ = c.w.offset;
  ref_session_ = SessionTime::FromNanos(ref_client_.nanos()) - offset_;
  min_delay_ = c.w.delay;
  // One probe's offset is off by (forward − backward)/2 at most δ/2 (RFC
  // 5905 §8), with nothing else to add.
  asymmetry_ = min_delay_ / 2;
  scatter_ = Duration::Zero();

  const double max_drift = options_.max_drift_ppm * 1e-6;
  const double prior = options_.drift_prior_ppm * 1e-6;
  drift_ = 0;
  drift_error_ = prior;
  drift_fitted_ = false;
  if (n < static_cast<size_t>(options_.min_envelope_samples)) return;
  const Sample& first = history_.front();
  const Sample& last = history_.back();
  if (last.t.t1 - first.t.t1 < options_.min_drift_span ||
      last.t.t4 - first.t.t4 < options_.min_drift_span) {
    return;
  }

  // One-way series with the session clock as reference: forward T2 − T1
  // rises with the client's rate error, backward T4 − T3 falls with it; the
  // constant path asymmetry shifts intercepts only, so it cancels in the
  // slopes. Centre on the first sample in int64 before going to double.
  std::vector<double> fx(n), fy(n), bx(n), by(n);
  const int64_t f0 = Diff(first.t.t2, first.t.t1);
  // Negating T3 − T4 fits: an accepted probe's |T3 − T4| is below 2^62 + δ.
  const int64_t b0 = -Diff(first.t.t3, first.t.t4);
  double fx_mean = 0, bx_mean = 0;
  for (size_t i = 0; i < n; ++i) {
    const ProbeTimestamps& t = history_[i].t;
    fx[i] = static_cast<double>((t.t1 - first.t.t1).nanos());
    fy[i] = static_cast<double>(static_cast<__int128>(Diff(t.t2, t.t1)) - f0);
    bx[i] = static_cast<double>((t.t4 - first.t.t4).nanos());
    by[i] = static_cast<double>(-static_cast<__int128>(Diff(t.t3, t.t4)) - b0);
    fx_mean += fx[i];
    bx_mean += bx[i];
  }
  fx_mean /= static_cast<double>(n);
  bx_mean /= static_cast<double>(n);
  const Line forward = LowerEnvelopeFit(fx, fy);
  const Line backward = LowerEnvelopeFit(bx, by);
  // Each slope's own error bounds. The drift is half the difference of the
  // slopes, so it is too high by at most half of (forward too steep +
  // backward too shallow), too low by at most half the other pair.
  const SlopeErrorBound fb = EnvelopeSlopeErrorBound(fx, fy, forward, options_.slope_bound_miss);
  const SlopeErrorBound bb = EnvelopeSlopeErrorBound(bx, by, backward, options_.slope_bound_miss);
  const double drift_bound = 0.5 * std::max(fb.steep + bb.shallow, fb.shallow + bb.steep);
  // A fitted drift is used only once it is known better than the prior.
  if (drift_bound < prior) {
    drift_ = std::clamp(0.5 * (forward.slope - backward.slope), -max_drift, max_drift);
    drift_error_ = drift_bound;
    drift_fitted_ = true;
  }

  // The offset from the two envelopes rather than one probe: at session
  // time x the forward envelope is θ + d_f,min and the backward one
  // d_b,min − θ, so θ = (forward − backward)/2 up to the asymmetry
  // (d_b,min − d_f,min)/2, at most half their sum δ_env. Every probe
  // contributes, not only the luckiest recent one. Read at the newest
  // probe's midpoint. A line can dip below its true floor there by at most
  // its slope error bound times the distance from the series' mean time
  // (where it cannot lie below the floor; see EnvelopeSlopeErrorBound), and
  // right of the mean only a too shallow line dips: that dip, not covered
  // by δ_env/2, is the offset scatter.
  const SessionTime mid = last.t.t1 + (last.t.t4 - last.t.t1) / 2;
  const double xf = static_cast<double>((mid - first.t.t1).nanos());
  const double xb = static_cast<double>((mid - first.t.t4).nanos());
  // The lines relative to the first probe's f0 and b0, which stay in
  // integers (an offset may be decades, beyond double's nanoseconds).
  const double fwd = forward.intercept + forward.slope * xf;
  const double bwd = backward.intercept + backward.slope * xb;
  const double envelope_delay = static_cast<double>(f0 + b0) + fwd + bwd;
  auto dip_of = [](const SlopeErrorBound& b, double from_mean) {
    return from_mean >= 0 ? b.shallow * from_mean : b.steep * -from_mean;
  };
  const double dip = std::max(dip_of(fb, xf - fx_mean), dip_of(bb, xb - bx_mean));
  if (!std::isfinite(envelope_delay) || !std::isfinite(dip) ||
      envelope_delay > static_cast<double>(min_delay_.nanos())) {
    return;  // the envelopes say nothing better than the chosen probe
  }
  const double envelope_asymmetry = std::max(0.5 * envelope_delay, 0.0);
  const __int128 base = static_cast<__int128>(f0) - b0;  // fits: |f0|, |b0| < 2^63
  const Duration envelope_offset =
      Duration::Nanos(ClampToInt64(base / 2)) +
      SaturatingNanos(0.5 * (fwd - bwd) + 0.5 * static_cast<double>(base % 2));
  // The chosen probe's interval carried to `mid` is a valid bound too; the
  // envelope offset lies |Δθ| from its centre, so the truth is within that
  // bound + |Δθ| of it. The smaller of the two is stated.
  const double since_probe = static_cast<double>((mid - ref_session_).nanos());
  const double probe_bound = static_cast<double>(asymmetry_.nanos()) +
                             std::abs(since_probe) * (kPhiPpm * 1e-6 + drift_error_);
  const double apart =
      static_cast<double>((envelope_offset - offset_).nanos()) - drift_ * since_probe;
  const double via_probe = probe_bound + std::abs(apart) - envelope_asymmetry;
  offset_ = envelope_offset;
  ref_session_ = mid;
  ref_client_ = ClientTime::FromNanos(mid.nanos()) + offset_;
  asymmetry_ = SaturatingNanos(envelope_asymmetry);
  scatter_ = SaturatingNanos(std::max(std::min(dip, via_probe), 0.0));
}

SessionTime ClockModel::ToSession(ClientTime t) const {
  if (!ready()) return SessionTime::FromNanos(t.nanos());
  // session = ref_session + dt / (1 + drift), written as dt minus a small
  // correction so the large part stays exact. t comes from outside, so dt
  // and the sum are taken in 128 bits and only the result is clamped.
  const __int128 dt = static_cast<__int128>(t.nanos()) - ref_client_.nanos();
  const double correction = static_cast<double>(dt) * drift_ / (1.0 + drift_);
  return SessionTime::FromNanos(
      ClampToInt64(ref_session_.nanos() + dt - SaturatingNanos(correction).nanos()));
}

Duration ClockModel::UncertaintyAt(ClientTime t) const {
  if (!ready()) return Duration::Max();
  const double distance =
      std::abs(static_cast<double>(static_cast<__int128>(t.nanos()) - ref_client_.nanos()));
  const double growth = distance * (kPhiPpm * 1e-6 + drift_error_);
  return SaturatingNanos(static_cast<double>(asymmetry_.nanos()) +
                         static_cast<double>(scatter_.nanos()) + growth);
}

ClockEstimate ClockModel::estimate() const {
  if (!ready()) return ClockEstimate{};
  ClockEstimate e;
  e.offset = offset_;
  e.drift_ppm = drift_ * 1e6;
  e.reference = ref_client_;
  e.uncertainty = UncertaintyAt(ref_client_);
  e.min_delay = min_delay_;
  e.samples = static_cast<int>(history_.size());
  e.asymmetry = asymmetry_;
  e.offset_scatter = scatter_;
  e.drift_error_ppm = drift_fitted_ ? drift_error_ * 1e6 : options_.drift_prior_ppm;
  e.drift_fitted = drift_fitted_;
  return e;
}

}  // namespace tickmark

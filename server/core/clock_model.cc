#include "server/core/clock_model.h"

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <numeric>
#include <vector>

namespace tickmark {
namespace {

// Raw nanosecond difference between readings of two different clocks; only
// first-order differences like this are ever taken (RFC 5905 §8), so no sum
// of two absolute timestamps can overflow.
int64_t Diff(ClientTime c, SessionTime s) { return c.nanos() - s.nanos(); }

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

OnWire ComputeOnWire(const ProbeTimestamps& p) {
  // Roles: the server is the RFC's requester, the device its responder, so
  // the RFC's θ (responder clock − requester clock) is client − session.
  const int64_t forward = Diff(p.t2, p.t1);   // T2 − T1
  const int64_t backward = Diff(p.t3, p.t4);  // T3 − T4
  const int64_t round_trip = (p.t4 - p.t1).nanos();
  const int64_t hold = (p.t3 - p.t2).nanos();
  return OnWire{Duration::Nanos((forward + backward) / 2),
                Duration::Nanos(round_trip - hold)};
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
  std::sort(order.begin(), order.end(), [&](size_t a, size_t b) {
    return x[a] != x[b] ? x[a] < x[b] : y[a] < y[b];
  });

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

ClockModel::ClockModel(Options o) : options_(o) {
  options_.filter_stages = std::max(options_.filter_stages, 1);
  options_.max_drift_ppm = std::max(options_.max_drift_ppm, 0.0);
}

ProbeVerdict ClockModel::AddProbe(const ProbeTimestamps& p) {
  if (p.t3 < p.t2 || p.t4 < p.t1) return ProbeVerdict::kRejectedReversed;
  OnWire w = ComputeOnWire(p);
  // RFC 5905 §8: a slightly negative δ comes from frequency error over the
  // exchange and is clamped; one beyond the precision means the timestamps
  // contradict each other.
  if (w.delay < -options_.precision) {
    return ProbeVerdict::kRejectedNegativeDelay;
  }
  w.delay = std::max(w.delay, options_.precision);

  ProbeVerdict verdict = ProbeVerdict::kAccepted;
  if (ready()) {
    const ClientTime mid_client = p.t2 + (p.t3 - p.t2) / 2;
    const SessionTime mid_session =
        SessionTime::FromNanos(mid_client.nanos() - w.offset.nanos());
    const Duration miss = Abs(ToSession(mid_client) - mid_session);
    const Duration allowed = UncertaintyAt(mid_client);
    const Duration fixed = options_.jump_threshold + w.delay;
    if (allowed < Duration::Max() - fixed && miss > fixed + allowed) {
      history_.clear();
      verdict = ProbeVerdict::kClockJump;
    }
  }

  history_.push_back(Sample{p, w});
  const size_t keep = static_cast<size_t>(options_.filter_stages);
  while (history_.size() > keep &&
         history_.back().t.t4 - history_.front().t.t4 > options_.drift_window) {
    history_.pop_front();
  }
  Refit();
  return verdict;
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
  ref_session_ = SessionTime::FromNanos(ref_client_.nanos() - offset_.nanos());
  min_delay_ = c.w.delay;

  const double max_drift = options_.max_drift_ppm * 1e-6;
  drift_ = 0;
  drift_error_ = max_drift;
  if (n < 2) return;
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
  const int64_t b0 = -Diff(first.t.t3, first.t.t4);
  for (size_t i = 0; i < n; ++i) {
    const ProbeTimestamps& t = history_[i].t;
    fx[i] = static_cast<double>((t.t1 - first.t.t1).nanos());
    fy[i] = static_cast<double>(Diff(t.t2, t.t1) - f0);
    bx[i] = static_cast<double>((t.t4 - first.t.t4).nanos());
    by[i] = static_cast<double>(-Diff(t.t3, t.t4) - b0);
  }
  const Line forward = LowerEnvelopeFit(fx, fy);
  const Line backward = LowerEnvelopeFit(bx, by);
  drift_ =
      std::clamp(0.5 * (forward.slope - backward.slope), -max_drift, max_drift);
  // Both slopes measure the same rate with opposite signs; what they fail to
  // share is fit error, so their disagreement is our drift error estimate.
  drift_error_ =
      std::min(0.5 * std::abs(forward.slope + backward.slope), 2 * max_drift);

  // With the drift known, the offset comes from the two envelopes rather
  // than one probe: at session time x the forward envelope is θ + d_f,min
  // and the backward one d_b,min − θ, so θ = (forward − backward) / 2 up to
  // the unmeasurable asymmetry (d_b,min − d_f,min) / 2, bounded by half
  // their sum. Every probe contributes, not only the luckiest recent one.
  // Evaluated at the newest probe's midpoint.
  const SessionTime mid = last.t.t1 + (last.t.t4 - last.t.t1) / 2;
  const double xf = static_cast<double>((mid - first.t.t1).nanos());
  const double xb = static_cast<double>((mid - first.t.t4).nanos());
  const double fwd = static_cast<double>(f0) + forward.intercept + forward.slope * xf;
  const double bwd = static_cast<double>(b0) + backward.intercept + backward.slope * xb;
  const double envelope_delay = fwd + bwd;
  if (!std::isfinite(envelope_delay) || envelope_delay > static_cast<double>(min_delay_.nanos())) {
    return;  // the envelopes say nothing better than the chosen probe
  }
  offset_ = SaturatingNanos(0.5 * (fwd - bwd));
  ref_session_ = mid;
  ref_client_ = ClientTime::FromNanos(mid.nanos() + offset_.nanos());
}

SessionTime ClockModel::ToSession(ClientTime t) const {
  if (!ready()) return SessionTime::FromNanos(t.nanos());
  // session = ref_session + dt / (1 + drift), written as dt minus a small
  // correction so the large part stays exact in int64.
  const Duration dt = t - ref_client_;
  const double correction =
      static_cast<double>(dt.nanos()) * drift_ / (1.0 + drift_);
  return ref_session_ + dt - SaturatingNanos(correction);
}

Duration ClockModel::UncertaintyAt(ClientTime t) const {
  if (!ready()) return Duration::Max();
  const double distance =
      std::abs(static_cast<double>((t - ref_client_).nanos()));
  const double growth = distance * (kPhiPpm * 1e-6 + drift_error_);
  return SaturatingNanos(static_cast<double>(min_delay_.nanos()) / 2 + growth);
}

ClockEstimate ClockModel::estimate() const {
  if (!ready()) return ClockEstimate{};
  return ClockEstimate{offset_,     drift_ * 1e6,
                       ref_client_, UncertaintyAt(ref_client_),
                       min_delay_,  static_cast<int>(history_.size())};
}

}  // namespace tickmark

#include "server/core/retime.h"

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <optional>
#include <vector>

namespace tickmark {
namespace {

// An int128 value clamped into int64.
int64_t Clamp64(__int128 v) {
  if (v > time_internal::kMaxNs) return time_internal::kMaxNs;
  if (v < time_internal::kMinNs) return time_internal::kMinNs;
  return static_cast<int64_t>(v);
}

// One usable probe, reduced to what the bounds need (nanoseconds).
struct Usable {
  size_t index = 0;        // in the caller's span
  int64_t t1 = 0;          // session
  int64_t t4 = 0;          // session
  int64_t mid = 0;         // session midpoint (T1+T4)/2
  int64_t client_mid = 0;  // client midpoint (T2+T3)/2
  int64_t forward = 0;     // T2 − T1  ≥ θ(T1)
  int64_t backward = 0;    // T4 − T3  ≥ −θ(T4)
  int64_t offset = 0;      // RFC 5905 §8 θ
  int64_t delay = 0;       // RFC 5905 §8 δ, clamped at 0
};

// The probe as Usable, or nullopt when its timestamps are reversed or do not
// fit (the live model rejects such probes; they never reach the ledger as
// accepted, but the span may come from anywhere).
std::optional<Usable> MakeUsable(size_t index, const ProbeTimestamps& p) {
  if (p.t3 < p.t2 || p.t4 < p.t1) return std::nullopt;
  const std::optional<OnWire> w = CheckedOnWire(p);
  if (!w) return std::nullopt;
  Usable u;
  u.index = index;
  u.t1 = p.t1.nanos();
  u.t4 = p.t4.nanos();
  u.mid = p.t1.nanos() + (p.t4.nanos() - p.t1.nanos()) / 2;
  u.client_mid = p.t2.nanos() + (p.t3.nanos() - p.t2.nanos()) / 2;
  // CheckedOnWire showed that T2 − T1 and T3 − T4 fit; −(T3 − T4) may not
  // only for T3 − T4 = INT64_MIN, which Clamp64 holds.
  u.forward = p.t2.nanos() - p.t1.nanos();
  u.backward = Clamp64(-static_cast<__int128>(p.t3.nanos() - p.t4.nanos()));
  u.offset = w->offset.nanos();
  u.delay = std::max<int64_t>(w->delay.nanos(), 0);
  return u;
}

// Whether b's offset differs from a's by more than a jump threshold, both
// delays and the drift bound over their distance explain (the rule of
// ClockModel's jump confirmation).
bool Disagree(const Usable& a, const Usable& b, const RetimeOptions& o) {
  const double gap_s = std::abs(static_cast<double>(static_cast<__int128>(b.mid) - a.mid)) * 1e-9;
  const double allowed = static_cast<double>(o.jump_threshold.nanos()) +
                         static_cast<double>(a.delay) + static_cast<double>(b.delay) +
                         gap_s * 2 * o.max_drift_ppm * 1e3;
  const double miss = std::abs(static_cast<double>(static_cast<__int128>(b.offset) - a.offset));
  return miss > allowed;
}

// Segments and the probes used in them.
struct Segmented {
  std::vector<size_t> starts;             // first input index of each segment
  std::vector<std::vector<Usable>> used;  // per segment, in input order
};

// The input index of a segment's last used probe (its start when it has none).
size_t LastIndex(const Segmented& s, size_t segment) {
  return s.used[segment].empty() ? s.starts[segment] : s.used[segment].back().index;
}

Segmented Segment(std::span<const RetimeProbe> probes, const RetimeOptions& o) {
  Segmented s;
  std::vector<Usable> all;
  std::vector<bool> restart, candidate;
  bool pending_restart = false;  // a restart marked on a probe that is not usable
  for (size_t i = 0; i < probes.size(); ++i) {
    pending_restart = pending_restart || probes[i].restart;
    if (auto u = MakeUsable(i, probes[i].t)) {
      all.push_back(*u);
      restart.push_back(pending_restart);
      candidate.push_back(probes[i].candidate);
      pending_restart = false;
    }
  }
  if (!probes.empty()) {
    s.starts.push_back(0);
    s.used.emplace_back();
  }
  std::optional<Usable> last;  // the last probe used in the current segment
  bool restart_taken = false;  // a candidate already began the segment its next probe restarts
  for (size_t k = 0; k < all.size(); ++k) {
    const Usable& p = all[k];
    const bool has_next = k + 1 < all.size();
    if (candidate[k]) {
      // The first probe of a new clock, if the next one restarted the model
      // and agrees with it; otherwise a probe the live model rightly ignored.
      if (!has_next || !restart[k + 1] || Disagree(p, all[k + 1], o)) continue;
      if (!s.used.back().empty()) {
        s.starts.push_back(p.index);
        s.used.emplace_back();
      }
      s.used.back().push_back(p);
      last = p;
      restart_taken = true;
      continue;
    }
    bool begins = restart[k] && !restart_taken && !s.used.back().empty();
    restart_taken = false;
    if (!begins && last && Disagree(*last, p, o)) {
      // A jump shows in every probe after it; one probe alone is an outlier.
      const bool confirmed =
          has_next && !Disagree(p, all[k + 1], o) && Disagree(*last, all[k + 1], o);
      if (!confirmed) continue;
      begins = true;
    }
    if (begins) {
      s.starts.push_back(p.index);
      s.used.emplace_back();
    }
    s.used.back().push_back(p);
    last = p;
  }
  return s;
}

// A point of a one-way series: x = Δ from the event (seconds), y = the
// bound on θ's residual there (nanoseconds).
struct Pt {
  double x = 0;
  double y = 0;
};

// The lower convex hull of `pts` (sorted by x here); of equal x only the
// lowest point can bind.
std::vector<Pt> LowerHull(std::vector<Pt> pts) {
  std::sort(pts.begin(), pts.end(),
            [](const Pt& a, const Pt& b) { return a.x != b.x ? a.x < b.x : a.y < b.y; });
  std::vector<Pt> hull;
  for (const Pt& p : pts) {
    if (!hull.empty() && hull.back().x == p.x) continue;
    while (hull.size() >= 2) {
      const Pt& o = hull[hull.size() - 2];
      const Pt& a = hull.back();
      if ((a.x - o.x) * (p.y - o.y) - (a.y - o.y) * (p.x - o.x) > 0) break;
      hull.pop_back();
    }
    hull.push_back(p);
  }
  return hull;
}

// A vertex of the feasible polygon: θ's residual at the event (ns) and the
// rate error (ns per second).
struct V {
  double a = 0;
  double r = 0;
};

// Clips the convex polygon `poly` to {ca·a + cr·r ≤ c} (Sutherland–Hodgman).
void Clip(std::vector<V>* poly, double ca, double cr, double c) {
  if (poly->empty()) return;
  std::vector<V> out;
  out.reserve(poly->size() + 1);
  const size_t n = poly->size();
  for (size_t i = 0; i < n; ++i) {
    const V& cur = (*poly)[i];
    const V& prev = (*poly)[(i + n - 1) % n];
    const double fc = ca * cur.a + cr * cur.r - c;
    const double fp = ca * prev.a + cr * prev.r - c;
    if ((fc <= 0) != (fp <= 0)) {
      const double t = fp / (fp - fc);
      out.push_back(V{prev.a + t * (cur.a - prev.a), prev.r + t * (cur.r - prev.r)});
    }
    if (fc <= 0) out.push_back(cur);
  }
  poly->swap(out);
}

// θ at session time x bounded by the probes [lo, hi) of a segment.
struct Bounds {
  int64_t theta_ref = 0;  // θ = theta_ref + residual
  double low = 0;         // residual bounds, ns
  double high = 0;
  int probes = 0;
};

class SegmentRetimer {
 public:
  SegmentRetimer(std::vector<Usable> probes, const RetimeOptions& o)
      : p_(std::move(probes)), o_(o) {
    std::sort(p_.begin(), p_.end(), [](const Usable& a, const Usable& b) { return a.mid < b.mid; });
    rate_ns_per_s_ = o_.max_drift_ppm * 1e3;
    wander_per_s_ = o_.wander_ppm_per_s * 1e-6;
  }

  size_t size() const { return p_.size(); }

  std::optional<RetimedTime> Retime(ClientTime client) const {
    const int64_t tc = client.nanos();
    // Start from the probe nearest in client time: its offset puts x within
    // a round trip and the drift over the distance of the truth.
    int64_t x = Clamp64(static_cast<__int128>(tc) - NearestByClient(tc).offset);
    std::optional<Bounds> b;
    int64_t s = x;
    int64_t used_x = x;
    for (int iteration = 0; iteration < 4; ++iteration) {
      b = BoundAt(x);
      if (!b) return std::nullopt;
      used_x = x;
      const double mid = 0.5 * (b->low + b->high);
      // An absurd reading (far beyond every probe) can leave the bounds
      // beyond int64: nothing to say about it.
      if (!(std::abs(mid) < 9e18) || !(b->high - b->low < 1.8e19)) return std::nullopt;
      s = Clamp64(static_cast<__int128>(tc) - b->theta_ref - std::llround(mid));
      const __int128 moved = static_cast<__int128>(s) - x;
      if (moved < 1000 && moved > -1000) break;
      x = s;
    }
    // θ was bounded at used_x, the truth s* lies near s: over |s* − used_x|
    // θ moves by at most the rate bound times that (see the header).
    const double r = o_.max_drift_ppm * 1e-6;
    const double half = 0.5 * (b->high - b->low);
    const double gap = std::abs(static_cast<double>(static_cast<__int128>(s) - used_x));
    const double u = (half + r * gap) / (1 - r);
    RetimedTime out;
    out.session = SessionTime::FromNanos(s);
    out.uncertainty =
        u >= 9.2e18 ? Duration::Max() : Duration::Nanos(static_cast<int64_t>(std::ceil(u)) + 1);
    out.outcome = RetimeOutcome::kRetimed;
    out.probes = b->probes;
    return out;
  }

 private:
  const Usable& NearestByClient(int64_t tc) const {
    // Client midpoints rise with session midpoints within a segment (up to
    // jitter between overlapping probes), so a binary search lands next to
    // the nearest.
    auto it = std::lower_bound(p_.begin(), p_.end(), tc,
                               [](const Usable& u, int64_t t) { return u.client_mid < t; });
    size_t k = static_cast<size_t>(it - p_.begin());
    size_t best = std::min(k, p_.size() - 1);
    auto dist = [&](size_t i) {
      return std::abs(static_cast<double>(static_cast<__int128>(p_[i].client_mid) - tc));
    };
    if (k > 0 && dist(k - 1) < dist(best)) best = k - 1;
    return p_[best];
  }

  // The probes within ±h of x, as an index range of p_.
  std::pair<size_t, size_t> Window(int64_t x, int64_t h) const {
    auto lo = std::lower_bound(p_.begin(), p_.end(), Clamp64(static_cast<__int128>(x) - h),
                               [](const Usable& u, int64_t t) { return u.mid < t; });
    auto hi = std::upper_bound(p_.begin(), p_.end(), Clamp64(static_cast<__int128>(x) + h),
                               [](int64_t t, const Usable& u) { return t < u.mid; });
    return {static_cast<size_t>(lo - p_.begin()), static_cast<size_t>(hi - p_.begin())};
  }

  // The `want` probes nearest x by midpoint (an event far from every probe).
  std::pair<size_t, size_t> Nearest(int64_t x, size_t want) const {
    const size_t n = p_.size();
    want = std::min(want, n);
    size_t k = Window(x, 0).first;  // first probe at or after x
    size_t lo = k, hi = k;
    while (hi - lo < want) {
      if (lo == 0) {
        ++hi;
      } else if (hi == n) {
        --lo;
      } else if (std::abs(static_cast<double>(static_cast<__int128>(p_[lo - 1].mid) - x)) <=
                 std::abs(static_cast<double>(static_cast<__int128>(p_[hi].mid) - x))) {
        --lo;
      } else {
        ++hi;
      }
    }
    return {lo, hi};
  }

  std::optional<Bounds> BoundAt(int64_t x) const {
    const size_t want = static_cast<size_t>(std::max(o_.window_probes, 1));
    int64_t h = std::max<int64_t>(o_.half_window.nanos(), 1);
    const int64_t h_max = std::max(o_.max_half_window.nanos(), h);
    auto range = Window(x, h);
    while (range.second - range.first < want && h < h_max) {
      h = h > h_max / 2 ? h_max : 2 * h;
      range = Window(x, h);
    }
    if (range.second == range.first) range = Nearest(x, want);
    // Probes that contradict a constant-rate clock over the window (a rate
    // change faster than the wander bound, a clock slewed hard): a narrower
    // window around the event may still be consistent.
    while (true) {
      if (std::optional<Bounds> b = Solve(x, range.first, range.second)) return b;
      if (range.second - range.first <= 2) return std::nullopt;
      const size_t n = range.second - range.first;
      auto narrower = Nearest(x, n / 2);
      narrower.first = std::max(narrower.first, range.first);
      narrower.second = std::min(narrower.second, range.second);
      if (narrower.second - narrower.first >= n) return std::nullopt;
      range = narrower;
    }
  }

  // The two-variable linear program of the header comment over probes
  // [lo, hi): the extent of θ(x) over the feasible (θ(x), r) polygon.
  std::optional<Bounds> Solve(int64_t x, size_t lo, size_t hi) const {
    if (hi <= lo) return std::nullopt;
    Bounds b;
    b.probes = static_cast<int>(hi - lo);
    // The reference: the probe nearest x, so the residuals stay small.
    size_t ref = lo;
    for (size_t k = lo; k < hi; ++k) {
      if (std::abs(static_cast<double>(static_cast<__int128>(p_[k].mid) - x)) <
          std::abs(static_cast<double>(static_cast<__int128>(p_[ref].mid) - x))) {
        ref = k;
      }
    }
    b.theta_ref = p_[ref].offset;
    const double eps = static_cast<double>(o_.precision.nanos());
    std::vector<Pt> upper;  // θ residual ≤ y at x + Δ
    std::vector<Pt> lower;  // θ residual ≥ y at x + Δ, stored negated
    upper.reserve(hi - lo);
    lower.reserve(hi - lo);
    for (size_t k = lo; k < hi; ++k) {
      const Usable& p = p_[k];
      const double df = static_cast<double>(static_cast<__int128>(p.t1) - x) * 1e-9;
      const double db = static_cast<double>(static_cast<__int128>(p.t4) - x) * 1e-9;
      const double wf = 0.5 * wander_per_s_ * df * df * 1e9;
      const double wb = 0.5 * wander_per_s_ * db * db * 1e9;
      const double yf = static_cast<double>(static_cast<__int128>(p.forward) - b.theta_ref);
      const double yb = static_cast<double>(static_cast<__int128>(p.backward) + b.theta_ref);
      upper.push_back(Pt{df, yf + eps + wf});
      // θ_res(T4) ≥ −yb − eps − wb, i.e. −θ_res ≤ yb + eps + wb: a lower hull
      // of the negated series.
      lower.push_back(Pt{db, yb + eps + wb});
    }
    const std::vector<Pt> up = LowerHull(std::move(upper));
    const std::vector<Pt> down = LowerHull(std::move(lower));
    // A box that holds every feasible pair: |r| ≤ R, and θ(x) within what
    // one constraint and the rate bound allow.
    const double big_r = rate_ns_per_s_;
    double a_hi = up.front().y + big_r * std::abs(up.front().x);
    double a_lo = -(down.front().y + big_r * std::abs(down.front().x));
    if (!(a_lo <= a_hi)) return std::nullopt;
    std::vector<V> poly = {{a_lo, -big_r}, {a_hi, -big_r}, {a_hi, big_r}, {a_lo, big_r}};
    for (const Pt& c : up) Clip(&poly, 1, c.x, c.y);      // a + r·Δ ≤ y
    for (const Pt& c : down) Clip(&poly, -1, -c.x, c.y);  // −(a + r·Δ) ≤ y
    if (poly.empty()) return std::nullopt;
    b.low = poly.front().a;
    b.high = poly.front().a;
    for (const V& v : poly) {
      b.low = std::min(b.low, v.a);
      b.high = std::max(b.high, v.a);
    }
    if (!std::isfinite(b.low) || !std::isfinite(b.high)) return std::nullopt;
    return b;
  }

  std::vector<Usable> p_;  // sorted by session midpoint
  const RetimeOptions& o_;
  double rate_ns_per_s_ = 0;  // max_drift_ppm as ns of θ per s
  double wander_per_s_ = 0;   // wander_ppm_per_s as a fraction per s
};

RetimedTime Kept(const RetimeEvent& e, RetimeOutcome why) {
  RetimedTime t;
  t.session = e.live;
  t.uncertainty = e.live_uncertainty;
  t.outcome = why;
  return t;
}

}  // namespace

const char* RetimeOutcomeName(RetimeOutcome outcome) {
  switch (outcome) {
    case RetimeOutcome::kRetimed:
      return "retimed";
    case RetimeOutcome::kNoProbes:
      return "no_probes";
    case RetimeOutcome::kFewProbes:
      return "few_probes";
    case RetimeOutcome::kInconsistent:
      return "inconsistent_probes";
  }
  return "unknown";
}

std::vector<size_t> RetimeSegments(std::span<const RetimeProbe> probes,
                                   const RetimeOptions& options) {
  return Segment(probes, options).starts;
}

std::vector<RetimedTime> RetimeClock(std::span<const RetimeProbe> probes,
                                     std::span<const RetimeEvent> events,
                                     const RetimeOptions& options) {
  Segmented seg = Segment(probes, options);
  std::vector<std::optional<SegmentRetimer>> retimers(seg.used.size());
  auto in_segment = [&](const RetimeEvent& e, size_t i) {
    const size_t n = seg.used[i].size();
    if (n == 0) return Kept(e, RetimeOutcome::kNoProbes);
    if (n < static_cast<size_t>(std::max(options.min_probes, 1))) {
      return Kept(e, RetimeOutcome::kFewProbes);
    }
    if (!retimers[i]) retimers[i].emplace(seg.used[i], options);
    std::optional<RetimedTime> t = retimers[i]->Retime(e.client);
    return t ? *t : Kept(e, RetimeOutcome::kInconsistent);
  };
  std::vector<RetimedTime> out;
  out.reserve(events.size());
  for (const RetimeEvent& e : events) {
    if (seg.starts.empty()) {
      out.push_back(Kept(e, RetimeOutcome::kNoProbes));
      continue;
    }
    // The segment of the last probe recorded before the event.
    const size_t last = e.probes_before == 0 ? 0 : std::min(e.probes_before, probes.size()) - 1;
    const size_t i = static_cast<size_t>(
        std::upper_bound(seg.starts.begin(), seg.starts.end(), last) - seg.starts.begin() - 1);
    RetimedTime t = in_segment(e, i);
    const bool at_jump = e.probes_before > 0 && i + 1 < seg.used.size() &&
                         (seg.used[i].empty() || last >= LastIndex(seg, i));
    if (at_jump && e.arrival != SessionTime()) {
      // Stamped before or after the jump: take the segment that puts the
      // event closest before its arrival (see the header).
      const RetimedTime later = in_segment(e, i + 1);
      auto lag = [&](const RetimedTime& r) {
        return static_cast<double>(static_cast<__int128>(e.arrival.nanos()) - r.session.nanos());
      };
      auto fits = [&](const RetimedTime& r) {
        return lag(r) >= -static_cast<double>(r.uncertainty.nanos());
      };
      const bool take_later = fits(later) != fits(t) ? fits(later)
                              : fits(later)          ? lag(later) < lag(t)
                                                     : std::abs(lag(later)) < std::abs(lag(t));
      if (take_later) t = later;
    }
    out.push_back(t);
  }
  return out;
}

std::string DescribeRetimeOptions(const RetimeOptions& o) {
  char buf[512];
  std::snprintf(buf, sizeof buf,
                "{\"method\":\"two-sided probe bounds\",\"half_window_s\":%.9g,"
                "\"max_half_window_s\":%.9g,\"window_probes\":%d,\"min_probes\":%d,"
                "\"max_drift_ppm\":%.9g,\"wander_ppm_per_s\":%.9g,\"precision_ns\":%lld,"
                "\"jump_threshold_ns\":%lld}",
                o.half_window.seconds(), o.max_half_window.seconds(), o.window_probes, o.min_probes,
                o.max_drift_ppm, o.wander_ppm_per_s, static_cast<long long>(o.precision.nanos()),
                static_cast<long long>(o.jump_threshold.nanos()));
  return buf;
}

}  // namespace tickmark

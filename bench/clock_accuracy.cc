// Clock accuracy (docs/architecture.md §9, issue 3): how far the server's clock model
// puts a client's event from its true session time, on emulated links, with
// the client's clock 3.2 s ahead and 80 ppm fast.
//
// What is measured is the estimator (server/core ClockModel), so the probe
// exchanges run in virtual time: one-way delays come from tools/linkemu's
// DelaySampler with a LinkProfile, the client's clock is a SimulatedClock,
// and probes follow the server's default schedule (LiveService::Options: a
// burst of 8 at 50 ms after the hello, then one per second, one outstanding
// at a time, sent on the ticker's 10 ms grid). Each run is one connection;
// the runs differ only in their delay draws (LinkProfile.seed) and ticker
// phase, so --runs runs give the error distribution. Each run maps one event
// at a uniformly drawn instant in [T, T + 1 s) for T = 10 s and 60 s after
// the hello.
//
// Beside the model, in the same runs: the naive estimate — the offset of the
// single most recent probe, no filter, no drift (RFC 5905 §8 applied to one
// exchange). And one candidate row ("envel*", not what the server does):
// the offset read at the event from the two lower envelopes that ClockModel
// already fits for drift, to show what the estimator could reach.
//
// Columns: |offset error| p50/p95/max; for the asymmetric link the ratio
// |error| / |(d_f − d_b)/2|, the asymmetry bound (derived from RFC 5905 §8: an
// estimate from a symmetric-delay assumption is off by exactly that);
// |drift error| p50/p95 (model only); and how many events fell outside the
// model's stated uncertainty (expected 0).
//
// A last section, "retimed beside live" (issue 12, part 4), replays whole
// 120 s connections and puts the after-the-fact retiming (server/core
// RetimeClock, every probe of the connection) beside the live mapping of the
// same events: |error| and stated uncertainty quantiles, and how many events
// fell outside their uncertainty.
//
// Prints; never asserts. Flags: --runs=N (default 1000). Unknown flags (e.g.
// scripts/bench.sh's --seconds) are ignored.
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <limits>
#include <optional>
#include <random>
#include <string>
#include <vector>

#include "server/core/clock_model.h"
#include "server/core/retime.h"
#include "server/core/time.h"
#include "tools/linkemu/delay_sampler.h"
#include "tools/linkemu/link_profile.h"
#include "tools/linkemu/simulated_clock.h"

namespace tickmark::bench {
namespace {

using linkemu::DelaySampler;
using linkemu::Direction;
using linkemu::Jitter;
using linkemu::LinkProfile;

constexpr Duration kClientOffset = Duration::Millis(3200);
constexpr double kClientDriftPpm = 80;
// The server's defaults (server/rpc/live_service.h LiveService::Options).
constexpr int kProbeBurst = 8;
constexpr Duration kBurstSpacing = Duration::Millis(50);
constexpr Duration kProbeInterval = Duration::Seconds(1);
constexpr Duration kTick = Duration::Millis(10);  // LiveService's ticker period
// Time the client takes between reading a probe and answering it.
constexpr Duration kClientHold = Duration::Micros(50);
// Virtual anchors: monotonic reading and UTC at the hello.
constexpr int64_t kMonoAtHello = 5'000'000'000'000;
constexpr int64_t kUtcAtHello = 1'750'000'000'000'000'000;

struct Link {
  const char* name;
  LinkProfile profile;
};

struct Sample {
  double model_error_ms = 0;  // |mapped − true| of the model
  double naive_error_ms = 0;  // |mapped − true| of the naive estimate
  double envelope_error_ms = 0;  // |mapped − true| of the envelope candidate
  double drift_error_ppm = 0;
  bool outside_uncertainty = false;
};

struct Horizon {
  Duration after;
  std::vector<Sample> samples;
};

double Percentile(std::vector<double> v, double q) {
  if (v.empty()) return 0;
  std::sort(v.begin(), v.end());
  const double pos = q * static_cast<double>(v.size() - 1);
  const size_t lo = static_cast<size_t>(std::floor(pos));
  const size_t hi = std::min(lo + 1, v.size() - 1);
  return v[lo] + (v[hi] - v[lo]) * (pos - static_cast<double>(lo));
}

// One connection in virtual time; appends one Sample per horizon.
void RunOnce(const Link& link, uint64_t seed, std::vector<Horizon>* horizons) {
  LinkProfile profile = link.profile;
  profile.seed = seed;
  DelaySampler forward(profile, Direction::kForward);    // client→server
  DelaySampler backward(profile, Direction::kBackward);  // server→client
  std::mt19937_64 rng(seed * 7919 + 17);
  std::uniform_real_distribution<double> unit(0.0, 1.0);

  const FakeMonotonic mono(kMonoAtHello);
  const linkemu::SimulatedClock client(&mono, kClientOffset, kClientDriftPpm);
  auto session_at = [](int64_t mono_ns) {
    return SessionTime::FromNanos(kUtcAtHello + (mono_ns - kMonoAtHello));
  };
  // The ticker's phase relative to the hello.
  const int64_t tick_phase = static_cast<int64_t>(unit(rng) * static_cast<double>(kTick.nanos()));
  auto next_tick = [&](int64_t m) {
    const int64_t k = (m - kMonoAtHello - tick_phase + kTick.nanos() - 1) / kTick.nanos();
    return kMonoAtHello + tick_phase + std::max<int64_t>(k, 0) * kTick.nanos();
  };

  ClockModel model;
  std::optional<Duration> naive_offset;  // the latest probe's θ
  // One-way series for the envelope candidate, centred on the first probe.
  std::vector<double> fx, fy, bx, by;
  std::optional<ProbeTimestamps> first;
  std::vector<int64_t> eval_at;          // event instants (mono), one per horizon
  for (const Horizon& h : *horizons) {
    eval_at.push_back(kMonoAtHello + h.after.nanos() +
                      static_cast<int64_t>(unit(rng) * 1e9));
  }
  size_t next_eval = 0;

  auto evaluate = [&](size_t i) {
    const int64_t m = eval_at[i];
    const ClientTime c = client.At(m);
    const SessionTime truth = session_at(m);
    Sample s;
    s.model_error_ms = Abs(model.ToSession(c) - truth).millis();
    const SessionTime naive = SessionTime::FromNanos(c.nanos() - naive_offset->nanos());
    s.naive_error_ms = Abs(naive - truth).millis();
    {
      // θ(t) = (forward envelope − backward envelope)/2 at session time t;
      // the envelopes' floors are the minimum one-way delays, so a symmetric
      // path cancels with more and more probes, not only the 8 in the filter.
      const Line f = LowerEnvelopeFit(fx, fy);
      const Line b = LowerEnvelopeFit(bx, by);
      const double x = static_cast<double>((truth - first->t1).nanos());  // ≈ t; slope is tiny
      const double f0 = static_cast<double>((first->t2.nanos() - first->t1.nanos()));
      const double b0 = static_cast<double>((first->t4.nanos() - first->t3.nanos()));
      const double theta = ((f.slope * x + f.intercept + f0) - (b.slope * x + b.intercept + b0)) / 2;
      const double mapped_minus_truth =
          static_cast<double>(c.nanos() - truth.nanos()) - theta;
      s.envelope_error_ms = std::abs(mapped_minus_truth) * 1e-6;
    }
    s.drift_error_ppm = std::abs(model.estimate().drift_ppm - kClientDriftPpm);
    s.outside_uncertainty = Abs(model.ToSession(c) - truth) > model.UncertaintyAt(c);
    (*horizons)[i].samples.push_back(s);
  };

  int64_t due = kMonoAtHello;  // next_probe_mono_
  int64_t free_at = kMonoAtHello;  // the previous probe's reply is in
  for (int k = 0; next_eval < eval_at.size(); ++k) {
    const int64_t m1 = next_tick(std::max(due, free_at));
    const int64_t m2 = m1 + forward.NextDelay().nanos();
    const int64_t m3 = m2 + kClientHold.nanos();
    const int64_t m4 = m3 + backward.NextDelay().nanos();
    // Events before this reply is in see the model as it was.
    while (next_eval < eval_at.size() && eval_at[next_eval] < m4) evaluate(next_eval++);
    const ProbeTimestamps p{session_at(m1), client.At(m2), client.At(m3), session_at(m4)};
    model.AddProbe(p);
    naive_offset = ComputeOnWire(p).offset;
    if (!first) first = p;
    fx.push_back(static_cast<double>((p.t1 - first->t1).nanos()));
    fy.push_back(static_cast<double>((p.t2.nanos() - p.t1.nanos()) -
                                     (first->t2.nanos() - first->t1.nanos())));
    bx.push_back(static_cast<double>((p.t4 - first->t4).nanos()));
    by.push_back(static_cast<double>((p.t4.nanos() - p.t3.nanos()) -
                                     (first->t4.nanos() - first->t3.nanos())));
    due = m1 + (k < kProbeBurst ? kBurstSpacing : kProbeInterval).nanos();
    free_at = m4;
  }
}

std::vector<Horizon> Measure(const Link& link, int runs) {
  std::vector<Horizon> horizons = {{Duration::Seconds(10), {}}, {Duration::Seconds(60), {}}};
  for (int r = 0; r < runs; ++r) RunOnce(link, static_cast<uint64_t>(r) + 1, &horizons);
  return horizons;
}

void PrintLink(const Link& link, const std::vector<Horizon>& horizons) {

  const LinkProfile& p = link.profile;
  const double bound_ms = std::abs((p.forward_delay - p.backward_delay).millis()) / 2;
  std::printf("\n%s   (forward %.1f ms, backward %.1f ms; (d_f - d_b)/2 bound %.3f ms)\n",
              link.name, p.forward_delay.millis(), p.backward_delay.millis(), bound_ms);
  std::printf("  %-6s %-6s %10s %10s %10s   %-24s %18s %10s\n", "after", "est.", "p50 ms",
              "p95 ms", "max ms", "|err|/bound p50/p95/max", "drift err p50/p95", "outside u");
  for (const Horizon& h : horizons) {
    std::vector<double> model, naive, envelope, drift;
    int outside = 0;
    for (const Sample& s : h.samples) {
      model.push_back(s.model_error_ms);
      naive.push_back(s.naive_error_ms);
      envelope.push_back(s.envelope_error_ms);
      drift.push_back(s.drift_error_ppm);
      outside += s.outside_uncertainty ? 1 : 0;
    }
    auto row = [&](const char* est, const std::vector<double>& e, bool with_drift) {
      char ratio[64] = "-";
      if (bound_ms > 0) {
        std::snprintf(ratio, sizeof ratio, "%.3f/%.3f/%.3f", Percentile(e, 0.5) / bound_ms,
                      Percentile(e, 0.95) / bound_ms, Percentile(e, 1.0) / bound_ms);
      }
      char drift_col[64] = "-";
      char outside_col[32] = "-";
      if (with_drift) {
        std::snprintf(drift_col, sizeof drift_col, "%.2f/%.2f ppm", Percentile(drift, 0.5),
                      Percentile(drift, 0.95));
        std::snprintf(outside_col, sizeof outside_col, "%d/%zu", outside, h.samples.size());
      }
      std::printf("  %-6s %-6s %10.4f %10.4f %10.4f   %-24s %18s %10s\n",
                  with_drift ? (std::to_string(h.after.nanos() / 1'000'000'000) + " s").c_str()
                             : "",
                  est, Percentile(e, 0.5), Percentile(e, 0.95), Percentile(e, 1.0), ratio,
                  drift_col, outside_col);
    };
    row("model", model, true);
    row("naive", naive, false);
    row("envel*", envelope, false);
  }
}

// The targets, recomputed here so they print beside the figures.
void PrintTargets(const std::vector<Link>& links,
                  const std::vector<std::vector<Horizon>>& results) {
  std::printf("\nTargets (printed, not asserted):\n");
  for (size_t i = 0; i < links.size(); ++i) {
    const Link& link = links[i];
    const std::vector<Horizon>& h = results[i];
    std::vector<double> e10, e60, d60;
    for (const Sample& s : h[0].samples) e10.push_back(s.model_error_ms);
    for (const Sample& s : h[1].samples) {
      e60.push_back(s.model_error_ms);
      d60.push_back(s.drift_error_ppm);
    }
    const LinkProfile& p = link.profile;
    const double bound_ms = std::abs((p.forward_delay - p.backward_delay).millis()) / 2;
    if (std::strstr(link.name, "symmetric 20 ms") != nullptr) {
      const double v = Percentile(e10, 0.95);
      std::printf("  p95 offset error <= 0.5 ms on %s after 10 s: %.4f ms  [%s]\n", link.name, v,
                  v <= 0.5 ? "met" : "NOT met");
    }
    if (bound_ms > 0) {
      const double v10 = Percentile(e10, 0.95) / bound_ms;
      const double v60 = Percentile(e60, 0.95) / bound_ms;
      std::printf("  p95 |error| within 1.1x of the bound on %s: %.3fx after 10 s, %.3fx after "
                  "60 s  [%s]\n",
                  link.name, v10, v60, std::max(v10, v60) <= 1.1 ? "met" : "NOT met");
    }
    const double dv = Percentile(d60, 0.95);
    std::printf("  p95 drift error <= 5 ppm after 60 s on %s: %.2f ppm  [%s]\n", link.name, dv,
                dv <= 5 ? "met" : "NOT met");
  }
}

// --- Retimed beside live -------------------------------------------------

struct RetimeSample {
  double live_error_ms = 0;
  double retimed_error_ms = 0;
  double live_u_ms = 0;
  double retimed_u_ms = 0;
  bool live_outside = false;
  bool retimed_outside = false;
  bool early = false;  // in the first 10 s after the hello
};

// One connection of `length` in virtual time, with the server's probe
// schedule as in RunOnce; events at uniformly drawn instants (about two per
// second) travel to the server over the link and are mapped live on arrival;
// afterwards every event is retimed with all of the connection's probes.
void RetimeOnce(const Link& link, uint64_t seed, Duration length,
                std::vector<RetimeSample>* out) {
  LinkProfile profile = link.profile;
  profile.seed = seed;
  DelaySampler forward(profile, Direction::kForward);
  DelaySampler backward(profile, Direction::kBackward);
  LinkProfile event_profile = profile;
  event_profile.seed = seed + 1'000'003;
  DelaySampler event_link(event_profile, Direction::kBackward);  // client to server
  std::mt19937_64 rng(seed * 104729 + 3);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  const FakeMonotonic mono(kMonoAtHello);
  const linkemu::SimulatedClock client(&mono, kClientOffset, kClientDriftPpm);
  auto session_at = [](int64_t mono_ns) {
    return SessionTime::FromNanos(kUtcAtHello + (mono_ns - kMonoAtHello));
  };
  const int64_t tick_phase = static_cast<int64_t>(unit(rng) * static_cast<double>(kTick.nanos()));
  auto next_tick = [&](int64_t m) {
    const int64_t k = (m - kMonoAtHello - tick_phase + kTick.nanos() - 1) / kTick.nanos();
    return kMonoAtHello + tick_phase + std::max<int64_t>(k, 0) * kTick.nanos();
  };
  struct Event {
    int64_t at;       // mono
    int64_t arrival;  // mono
  };
  std::vector<Event> events(static_cast<size_t>(2 * length.seconds()));
  for (Event& e : events) {
    e.at = kMonoAtHello + static_cast<int64_t>(unit(rng) * static_cast<double>(length.nanos()));
    e.arrival = e.at + event_link.NextDelay().nanos();
  }
  std::sort(events.begin(), events.end(),
            [](const Event& a, const Event& b) { return a.arrival < b.arrival; });

  ClockModel model;
  std::vector<RetimeProbe> probes;
  std::vector<RetimeEvent> mapped;
  std::vector<SessionTime> truth;
  size_t next_event = 0;
  auto map_until = [&](int64_t m4) {  // events that arrive before this reply
    for (; next_event < events.size() && events[next_event].arrival < m4; ++next_event) {
      const Event& e = events[next_event];
      const ClientTime c = client.At(e.at);
      // Messages wait for the first probe (LiveService::Options::clock_wait).
      const int64_t arrival = model.ready() ? e.arrival : m4;
      mapped.push_back({c, model.ToSession(c), model.UncertaintyAt(c), probes.size(),
                        session_at(arrival)});
      truth.push_back(session_at(e.at));
    }
  };
  int64_t due = kMonoAtHello;
  int64_t free_at = kMonoAtHello;
  const int64_t stop = kMonoAtHello + length.nanos() + Duration::Seconds(5).nanos();
  for (int k = 0; due < stop; ++k) {
    const int64_t m1 = next_tick(std::max(due, free_at));
    const int64_t m2 = m1 + forward.NextDelay().nanos();
    const int64_t m3 = m2 + kClientHold.nanos();
    const int64_t m4 = m3 + backward.NextDelay().nanos();
    if (model.ready()) map_until(m4);
    const ProbeTimestamps p{session_at(m1), client.At(m2), client.At(m3), session_at(m4)};
    const ProbeVerdict v = model.AddProbe(p);
    if (v == ProbeVerdict::kAccepted || v == ProbeVerdict::kClockJump) {
      probes.push_back({p, v == ProbeVerdict::kClockJump, false});
    }
    if (probes.size() == 1) map_until(m4);  // those held for the first probe
    due = m1 + (k < kProbeBurst ? kBurstSpacing : kProbeInterval).nanos();
    free_at = m4;
  }
  map_until(std::numeric_limits<int64_t>::max());
  const std::vector<RetimedTime> retimed = RetimeClock(probes, mapped);
  for (size_t i = 0; i < mapped.size(); ++i) {
    RetimeSample s;
    const Duration live_err = Abs(mapped[i].live - truth[i]);
    const Duration retimed_err = Abs(retimed[i].session - truth[i]);
    s.live_error_ms = live_err.millis();
    s.retimed_error_ms = retimed_err.millis();
    s.live_u_ms = mapped[i].live_uncertainty.millis();
    s.retimed_u_ms = retimed[i].uncertainty.millis();
    s.live_outside = live_err > mapped[i].live_uncertainty;
    s.retimed_outside = retimed_err > retimed[i].uncertainty;
    s.early = truth[i] - session_at(kMonoAtHello) < Duration::Seconds(10);
    out->push_back(s);
  }
}

void PrintRetimedBesideLive(const std::vector<Link>& links, int runs) {
  const Duration length = Duration::Seconds(120);
  std::printf("\nRetimed beside live: %d connections of %lld s per link, events about 2/s at "
              "random instants;\nlive = the model when the event arrived, retimed = every probe "
              "of the connection (server/core/retime.h)\n",
              runs, static_cast<long long>(length.nanos() / 1'000'000'000));
  std::printf("  %-8s %-8s %10s %10s %10s   %10s %10s   %12s\n", "events", "est.",
              "|err| p50", "p95 ms", "max ms", "u p50 ms", "u p95 ms", "outside u");
  for (const Link& link : links) {
    std::printf("  %s\n", link.name);
    std::vector<RetimeSample> samples;
    for (int r = 0; r < runs; ++r) RetimeOnce(link, static_cast<uint64_t>(r) + 1, length, &samples);
    for (int early = 0; early < 2; ++early) {
      std::vector<double> le, re, lu, ru;
      int lo = 0, ro = 0;
      for (const RetimeSample& s : samples) {
        if (early == 1 && !s.early) continue;
        le.push_back(s.live_error_ms);
        re.push_back(s.retimed_error_ms);
        lu.push_back(s.live_u_ms);
        ru.push_back(s.retimed_u_ms);
        lo += s.live_outside ? 1 : 0;
        ro += s.retimed_outside ? 1 : 0;
      }
      const char* which = early == 1 ? "<10 s" : "all";
      auto row = [&](const char* est, const std::vector<double>& e,
                     const std::vector<double>& u, int outside) {
        char out_col[32];
        std::snprintf(out_col, sizeof out_col, "%d/%zu", outside, e.size());
        std::printf("  %-8s %-8s %10.4f %10.4f %10.4f   %10.4f %10.4f   %12s\n", which,
                    est, Percentile(e, 0.5), Percentile(e, 0.95), Percentile(e, 1.0),
                    Percentile(u, 0.5), Percentile(u, 0.95), out_col);
      };
      row("live", le, lu, lo);
      row("retimed", re, ru, ro);
    }
  }
}

}  // namespace
}  // namespace tickmark::bench

int main(int argc, char** argv) {
  using namespace tickmark;
  using namespace tickmark::bench;
  int runs = 1000;
  for (int i = 1; i < argc; ++i) {
    if (std::strncmp(argv[i], "--runs=", 7) == 0) runs = std::max(1, std::atoi(argv[i] + 7));
  }
  const std::vector<Link> links = {
      {"symmetric 1 ms ± 0.1 ms",
       LinkProfile::Symmetric(Duration::Millis(1), Jitter::Uniform(Duration::Micros(100)))},
      {"symmetric 20 ms ± 5 ms",
       LinkProfile::Symmetric(Duration::Millis(20), Jitter::Uniform(Duration::Millis(5)))},
      {"asymmetric 5 ms / 25 ms ± 1 ms",
       LinkProfile{Duration::Millis(5), Duration::Millis(25), Jitter::Uniform(Duration::Millis(1)),
                   Jitter::Uniform(Duration::Millis(1)), 0.0, 0.0, 1}},
  };
  std::printf("clock_accuracy: ClockModel vs one naive probe, client offset +%.1f s, drift +%.0f "
              "ppm, %d runs per link,\n"
              "probes: burst of %d at %lld ms, then every %lld s (virtual time; jitter uniform)\n",
              kClientOffset.seconds(), kClientDriftPpm, runs, kProbeBurst,
              static_cast<long long>(kBurstSpacing.nanos() / 1'000'000),
              static_cast<long long>(kProbeInterval.nanos() / 1'000'000'000));
  std::vector<std::vector<Horizon>> results;
  for (const Link& link : links) {
    results.push_back(Measure(link, runs));
    PrintLink(link, results.back());
  }
  std::printf("\n* envel: the offset read from the two lower envelopes (Moon et al.'s lines) at\n"
              "  the event itself. ClockModel reads them at its newest probe once the drift is\n"
              "  fitted (>= 10 s of probes) and projects with the drift; before that it uses the\n"
              "  minimum-delay probe of the last 8.\n");
  PrintTargets(links, results);
  PrintRetimedBesideLive(links, std::max(1, runs / 10));
  return 0;
}

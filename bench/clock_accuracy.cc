// Clock accuracy (docs/architecture.md §9, issues 3 and 12): how far the
// server's clock model puts a client's event from its true session time, on
// emulated links, and whether the truth lies inside the uncertainty the model
// states.
//
// What is measured is the estimator (server/core ClockModel) and the probe
// schedule (server/core ProbeScheduler, with the server's default options),
// so the probe exchanges run in virtual time: one-way delays come from
// tools/linkemu's DelaySampler with a LinkProfile, the client's clock is a
// SimulatedClock, and probes go out as the server sends them: one outstanding
// at a time, on the ticker's 10 ms grid, when the scheduler says. Each run is
// one connection; the runs differ only in their delay draws (LinkProfile.seed)
// and ticker phase, so --runs runs give the error distribution.
//
// Per run, events at uniformly drawn instants: one in [T, T + 1 s) for
// T = 10 s and 60 s after the hello (the accuracy rows), and one in every
// second of the first 60 s (with the two above: the coverage count). An event
// before the first probe answer is mapped as the server does, with the
// hello's reading and a 1 s uncertainty.
//
// Baselines in the same runs: the fixed schedule (adaptive probing off: a
// burst of 8 at 50 ms, then one per second), and the naive estimate — the
// offset of the single most recent probe, no filter, no drift (RFC 5905 §8
// applied to one exchange).
//
// Columns: |offset error| p50/p95/max; for the asymmetric link the ratio
// |error| / |(d_f − d_b)/2|, the asymmetry bound (derived from RFC 5905 §8: an
// estimate from a symmetric-delay assumption is off by exactly that);
// |drift error| p50/p95 of the drift the model uses (0 until its bound beats
// the prior); probes sent per client by then. Below each link: coverage (the
// truth inside the stated uncertainty), and how often a drift in use was
// within its own stated error bound.
//
// A last section, "retimed beside live", replays whole 120 s connections and
// puts the after-the-fact retiming (server/core RetimeClock, every probe of
// the connection) beside the live mapping of the same events: |error| and
// stated uncertainty quantiles, and how many events fell outside their
// uncertainty.
//
// Prints; never asserts. Flags: --runs=N (default 300; each adaptive run
// refits its model some 700 times). Unknown flags (e.g.
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
#include "server/core/probe_scheduler.h"
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
constexpr Duration kTick = Duration::Millis(10);  // LiveService's ticker period
// Time the client takes between reading a probe and answering it.
constexpr Duration kClientHold = Duration::Micros(50);
// What the server states for a time mapped before any probe came back
// (server/rpc/ingest_reactor.cc, kHelloMappingUncertainty).
constexpr Duration kHelloMappingUncertainty = Duration::Seconds(1);
// Virtual anchors: monotonic reading and UTC at the hello.
constexpr int64_t kMonoAtHello = 5'000'000'000'000;
constexpr int64_t kUtcAtHello = 1'750'000'000'000'000'000;
constexpr int kCoverageSeconds = 60;

struct Link {
  const char* name;
  LinkProfile profile;
  double drift_ppm;  // the client clock's true rate error
};

struct Sample {
  double model_error_ms = 0;  // |mapped − true| of the model
  double naive_error_ms = 0;  // |mapped − true| of the naive estimate
  double drift_error_ppm = 0;
  int probes = 0;  // sent so far
};

struct Horizon {
  Duration after;
  std::vector<Sample> samples;
};

struct Coverage {
  long events = 0;
  long inside = 0;             // truth within the stated uncertainty
  double worst_excess_ms = 0;  // largest |error| − uncertainty, if any outside
  long drift_checks = 0;       // events seen with a fitted drift in use
  long drift_within = 0;       // ... whose true drift error was within its bound
};

struct Result {
  std::vector<Horizon> horizons = {{Duration::Seconds(10), {}}, {Duration::Seconds(60), {}}};
  Coverage coverage;
};

double Percentile(std::vector<double> v, double q) {
  if (v.empty()) return 0;
  std::sort(v.begin(), v.end());
  const double pos = q * static_cast<double>(v.size() - 1);
  const size_t lo = static_cast<size_t>(std::floor(pos));
  const size_t hi = std::min(lo + 1, v.size() - 1);
  return v[lo] + (v[hi] - v[lo]) * (pos - static_cast<double>(lo));
}

// One connection in virtual time; appends one Sample per horizon and counts
// coverage.
void RunOnce(const Link& link, const ProbeScheduler::Options& schedule, uint64_t seed,
             Result* result) {
  LinkProfile profile = link.profile;
  profile.seed = seed;
  DelaySampler forward(profile, Direction::kForward);    // client→server
  DelaySampler backward(profile, Direction::kBackward);  // server→client
  std::mt19937_64 rng(seed * 7919 + 17);
  std::uniform_real_distribution<double> unit(0.0, 1.0);

  const FakeMonotonic mono(kMonoAtHello);
  const linkemu::SimulatedClock client(&mono, kClientOffset, link.drift_ppm);
  auto session_at = [](int64_t mono_ns) {
    return SessionTime::FromNanos(kUtcAtHello + (mono_ns - kMonoAtHello));
  };
  // The ticker's phase relative to the hello.
  const int64_t tick_phase = static_cast<int64_t>(unit(rng) * static_cast<double>(kTick.nanos()));
  auto next_tick = [&](int64_t m) {
    const int64_t k = (m - kMonoAtHello - tick_phase + kTick.nanos() - 1) / kTick.nanos();
    return kMonoAtHello + tick_phase + std::max<int64_t>(k, 0) * kTick.nanos();
  };
  // The hello left the client one forward delay before it arrived.
  const Duration hello_offset =
      client.At(kMonoAtHello - forward.NextDelay().nanos()) - ClientTime::FromNanos(kUtcAtHello);

  // Events: (mono instant, horizon index or -1 for coverage only), in time order.
  struct Event {
    int64_t mono;
    int horizon;
  };
  std::vector<Event> events;
  for (size_t h = 0; h < result->horizons.size(); ++h) {
    events.push_back(
        {kMonoAtHello + result->horizons[h].after.nanos() + static_cast<int64_t>(unit(rng) * 1e9),
         static_cast<int>(h)});
  }
  for (int s = 0; s < kCoverageSeconds; ++s) {
    events.push_back(
        {kMonoAtHello + Duration::Seconds(s).nanos() + static_cast<int64_t>(unit(rng) * 1e9), -1});
  }
  std::sort(events.begin(), events.end(),
            [](const Event& a, const Event& b) { return a.mono < b.mono; });
  size_t next_event = 0;

  ClockModel model;
  std::optional<Duration> naive_offset;  // the latest probe's θ
  int probes = 0;
  auto evaluate = [&](const Event& ev) {
    const ClientTime c = client.At(ev.mono);
    const SessionTime truth = session_at(ev.mono);
    SessionTime mapped = SessionTime::FromNanos(c.nanos()) - hello_offset;
    Duration uncertainty = kHelloMappingUncertainty;
    if (model.ready()) {
      mapped = model.ToSession(c);
      uncertainty = model.UncertaintyAt(c);
    }
    const Duration error = Abs(mapped - truth);
    Coverage& cov = result->coverage;
    ++cov.events;
    if (error <= uncertainty) {
      ++cov.inside;
    } else {
      cov.worst_excess_ms = std::max(cov.worst_excess_ms, (error - uncertainty).millis());
    }
    const ClockEstimate e = model.estimate();
    const double drift_error = std::abs(e.drift_ppm - link.drift_ppm);
    if (e.drift_fitted) {
      ++cov.drift_checks;
      if (drift_error <= e.drift_error_ppm) ++cov.drift_within;
    }
    if (ev.horizon < 0) return;
    Sample s;
    s.model_error_ms = error.millis();
    const SessionTime naive =
        SessionTime::FromNanos(c.nanos()) - naive_offset.value_or(hello_offset);
    s.naive_error_ms = Abs(naive - truth).millis();
    s.drift_error_ppm = drift_error;
    s.probes = probes;
    result->horizons[static_cast<size_t>(ev.horizon)].samples.push_back(s);
  };

  ProbeScheduler scheduler(schedule);
  scheduler.Restart(Duration::Zero());
  int64_t free_at = kMonoAtHello;  // the previous probe's reply is in
  while (next_event < events.size()) {
    const int64_t m1 = next_tick(std::max(kMonoAtHello + scheduler.due().nanos(), free_at));
    const Duration at = Duration::Nanos(m1 - kMonoAtHello);
    // One client: the server-wide budget always has a token for it.
    if (!scheduler.Admit(at, [] { return true; })) continue;
    const ClockEstimate before = model.estimate();
    scheduler.Sent(at, before);  // decided when the probe goes out, as the server does
    ++probes;
    const int64_t m2 = m1 + forward.NextDelay().nanos();
    const int64_t m3 = m2 + kClientHold.nanos();
    const int64_t m4 = m3 + backward.NextDelay().nanos();
    // Events before this reply is in see the model as it was.
    while (next_event < events.size() && events[next_event].mono < m4) {
      evaluate(events[next_event++]);
    }
    const ProbeTimestamps p{session_at(m1), client.At(m2), client.At(m3), session_at(m4)};
    model.AddProbe(p);
    naive_offset = ComputeOnWire(p).offset;
    free_at = m4;
  }
}

Result Measure(const Link& link, const ProbeScheduler::Options& schedule, int runs) {
  Result r;
  for (int i = 0; i < runs; ++i) RunOnce(link, schedule, static_cast<uint64_t>(i) + 1, &r);
  return r;
}

double BoundMs(const Link& link) {
  const LinkProfile& p = link.profile;
  return std::abs((p.forward_delay - p.backward_delay).millis()) / 2;
}

std::vector<double> Column(const Horizon& h, double Sample::*field) {
  std::vector<double> v;
  for (const Sample& s : h.samples) v.push_back(s.*field);
  return v;
}

void PrintLink(const Link& link, const Result& adaptive, const Result& fixed) {
  const LinkProfile& p = link.profile;
  const double bound_ms = BoundMs(link);
  std::printf(
      "\n%s   (forward %.1f ms, backward %.1f ms; (d_f - d_b)/2 bound %.3f ms; client "
      "drift %+.0f ppm)\n",
      link.name, p.forward_delay.millis(), p.backward_delay.millis(), bound_ms, link.drift_ppm);
  std::printf("  %-6s %-9s %-6s %9s %9s %9s   %-23s %19s %7s\n", "after", "schedule", "est.",
              "p50 ms", "p95 ms", "max ms", "|err|/bound p50/p95/max", "drift err p50/p95",
              "probes");
  for (size_t i = 0; i < adaptive.horizons.size(); ++i) {
    auto row = [&](const char* after, const char* schedule, const char* est, const Horizon& h,
                   double Sample::*field, bool with_drift) {
      const std::vector<double> e = Column(h, field);
      char ratio[64] = "-";
      if (bound_ms > 0) {
        std::snprintf(ratio, sizeof ratio, "%.3f/%.3f/%.3f", Percentile(e, 0.5) / bound_ms,
                      Percentile(e, 0.95) / bound_ms, Percentile(e, 1.0) / bound_ms);
      }
      char drift_col[64] = "-";
      char probes_col[32] = "-";
      if (with_drift) {
        const std::vector<double> d = Column(h, &Sample::drift_error_ppm);
        std::snprintf(drift_col, sizeof drift_col, "%.2f/%.2f ppm", Percentile(d, 0.5),
                      Percentile(d, 0.95));
        std::vector<double> n;
        for (const Sample& s : h.samples) n.push_back(s.probes);
        std::snprintf(probes_col, sizeof probes_col, "%.0f", Percentile(n, 0.5));
      }
      std::printf("  %-6s %-9s %-6s %9.4f %9.4f %9.4f   %-23s %19s %7s\n", after, schedule, est,
                  Percentile(e, 0.5), Percentile(e, 0.95), Percentile(e, 1.0), ratio, drift_col,
                  probes_col);
    };
    const std::string after =
        std::to_string(adaptive.horizons[i].after.nanos() / 1'000'000'000) + " s";
    row(after.c_str(), "adaptive", "model", adaptive.horizons[i], &Sample::model_error_ms, true);
    row("", "fixed", "model", fixed.horizons[i], &Sample::model_error_ms, true);
    row("", "fixed", "naive", fixed.horizons[i], &Sample::naive_error_ms, false);
  }
  auto coverage = [](const char* schedule, const Coverage& c) {
    std::printf(
        "  coverage, %-8s: %ld/%ld events inside the stated uncertainty (%.3f%%)", schedule,
        c.inside, c.events,
        100.0 * static_cast<double>(c.inside) / static_cast<double>(std::max(c.events, 1L)));
    if (c.inside < c.events) std::printf(", worst miss by %.4f ms", c.worst_excess_ms);
    std::printf("; drift within its bound at %ld/%ld\n", c.drift_within, c.drift_checks);
  };
  coverage("adaptive", adaptive.coverage);
  coverage("fixed", fixed.coverage);
}

// The issues' targets, recomputed here so they print beside the figures.
void PrintTargets(const std::vector<Link>& links, const std::vector<Result>& results) {
  std::printf("\nTargets (adaptive schedule; printed, not asserted):\n");
  auto verdict = [](bool met) { return met ? "met" : "NOT met"; };
  for (size_t i = 0; i < links.size(); ++i) {
    const Link& link = links[i];
    const Result& r = results[i];
    const std::vector<double> e10 = Column(r.horizons[0], &Sample::model_error_ms);
    const std::vector<double> e60 = Column(r.horizons[1], &Sample::model_error_ms);
    const std::vector<double> d60 = Column(r.horizons[1], &Sample::drift_error_ppm);
    const double bound_ms = BoundMs(link);
    if (std::strstr(link.name, "symmetric 20 ms") == link.name && link.drift_ppm == 80) {
      const double v = Percentile(e10, 0.95);
      std::printf("  p95 offset error <= 0.5 ms after 10 s on %s: %.4f ms  [%s]\n", link.name, v,
                  verdict(v <= 0.5));
    }
    if (bound_ms > 0) {
      const double v10 = Percentile(e10, 0.95) / bound_ms;
      const double v60 = Percentile(e60, 0.95) / bound_ms;
      std::printf(
          "  p95 |error| within 1.1x of the bound on %s: %.3fx after 10 s, %.3fx after "
          "60 s  [%s]\n",
          link.name, v10, v60, verdict(std::max(v10, v60) <= 1.1));
    }
    if (link.drift_ppm == 80) {
      const double dv = Percentile(d60, 0.95);
      std::printf("  p95 drift error <= 5 ppm after 60 s on %s: %.2f ppm  [%s]\n", link.name, dv,
                  verdict(dv <= 5));
    }
    const Coverage& c = r.coverage;
    const double share =
        static_cast<double>(c.inside) / static_cast<double>(std::max(c.events, 1L));
    std::printf("  coverage >= 99.9%% on %s (%+.0f ppm): %.3f%%  [%s]\n", link.name, link.drift_ppm,
                100 * share, verdict(share >= 0.999));
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
  const linkemu::SimulatedClock client(&mono, kClientOffset, link.drift_ppm);
  auto session_at = [](int64_t mono_ns) {
    return SessionTime::FromNanos(kUtcAtHello + (mono_ns - kMonoAtHello));
  };
  // The fixed schedule (burst, then steady): retiming gains most where the
  // live model had the fewest probes.
  ProbeScheduler::Options fixed;
  fixed.adaptive = false;
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
    due = m1 + (k < fixed.burst ? fixed.burst_interval : fixed.steady_interval).nanos();
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
  int runs = 300;
  for (int i = 1; i < argc; ++i) {
    if (std::strncmp(argv[i], "--runs=", 7) == 0) runs = std::max(1, std::atoi(argv[i] + 7));
  }
  const std::vector<Link> links = {
      {"symmetric 1 ms ± 0.1 ms",
       LinkProfile::Symmetric(Duration::Millis(1), Jitter::Uniform(Duration::Micros(100))), 80},
      {"symmetric 20 ms ± 5 ms",
       LinkProfile::Symmetric(Duration::Millis(20), Jitter::Uniform(Duration::Millis(5))), 80},
      {"asymmetric 5 ms / 25 ms ± 1 ms",
       LinkProfile{Duration::Millis(5), Duration::Millis(25), Jitter::Uniform(Duration::Millis(1)),
                   Jitter::Uniform(Duration::Millis(1)), 0.0, 0.0, 1},
       80},
      // The case: a clock beyond the 100 ppm prior, events from the start.
      {"symmetric 20 ms ± 5 ms",
       LinkProfile::Symmetric(Duration::Millis(20), Jitter::Uniform(Duration::Millis(5))), 150},
      {"LAN 0.3 ms ± 0.25 ms",
       LinkProfile::Symmetric(Duration::Micros(300), Jitter::Uniform(Duration::Micros(250))), 150},
  };
  const ProbeScheduler::Options adaptive;  // the server's defaults
  ProbeScheduler::Options fixed;
  fixed.adaptive = false;
  std::printf(
      "clock_accuracy: ClockModel with the server's adaptive probe schedule vs the fixed "
      "one and one naive probe;\nclient offset +%.1f s, %d runs per link (virtual time; "
      "jitter uniform). Adaptive: %lld ms apart for the first %lld s,\nthen %lld ms "
      "while the offset scatter > %lld us or the drift error > %.0f ppm, else %lld ms. "
      "Fixed: %d at %lld ms, then %lld ms.\n",
      kClientOffset.seconds(), runs,
      static_cast<long long>(adaptive.fast_interval.nanos() / 1'000'000),
      static_cast<long long>(adaptive.fast_for.nanos() / 1'000'000'000),
      static_cast<long long>(adaptive.boost_interval.nanos() / 1'000'000),
      static_cast<long long>(adaptive.target_scatter.nanos() / 1'000), adaptive.target_drift_ppm,
      static_cast<long long>(adaptive.steady_interval.nanos() / 1'000'000), fixed.burst + 1,
      static_cast<long long>(fixed.burst_interval.nanos() / 1'000'000),
      static_cast<long long>(fixed.steady_interval.nanos() / 1'000'000));
  std::vector<Result> results;
  for (const Link& link : links) {
    results.push_back(Measure(link, adaptive, runs));
    PrintLink(link, results.back(), Measure(link, fixed, runs));
  }
  PrintTargets(links, results);
  PrintRetimedBesideLive(links, std::max(1, runs / 10));
  return 0;
}

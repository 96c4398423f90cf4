// Step-credits computed per second on one core by CreditEngine (docs/architecture.md
// §9; target >= 5M/s), beside a baseline measured in the same run: a plain
// loop calling tickmark::Credit() over exactly the (feedback, step) pairs the
// engine credited. The ratio engine ÷ baseline says what the engine's
// bookkeeping (timelines, reach lookups, labels, settlement, output records)
// costs on top of the arithmetic it cannot avoid.
//
// Workload: one agent at 50 steps/s (20 ms steps, ends given), a feedback
// every 100 ms judged 0.5 s earlier, the watermark following the newest
// event, for two kernels from the literature: uniform 0.2–4 s (Warnell et
// al., AAAI 2018) and gamma shape 2, scale 0.28 s (Knox & Stone, K-CAP 2009 —
// from memory). Single-threaded; each row runs about --seconds (default 1)
// of this thread's CPU time, which is also what the rates are divided by.
//
// Prints; never asserts.
#include <time.h>

#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <string>
#include <vector>

#include "server/core/credit_engine.h"
#include "server/core/delay_kernel.h"

namespace tickmark::bench {
namespace {

// This thread's CPU time: "per second on one core" even when the shared
// machine gives the process less than a whole core.
double CpuSeconds() {
  timespec ts{};
  clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
  return static_cast<double>(ts.tv_sec) + static_cast<double>(ts.tv_nsec) * 1e-9;
}

struct Pair {
  SessionTime t_f, start, end;
};

struct Row {
  std::string kernel;
  uint64_t credits = 0;
  uint64_t labels = 0;
  double engine_seconds = 0;
  double baseline_seconds = 0;
  uint64_t baseline_evaluations = 0;
  double checksum = 0;  // keeps the baseline loop from being optimised away
};

// Feeds the engine `minutes` of session per round until `seconds` have
// passed; records the credited pairs of the first round for the baseline.
Row Measure(const std::string& name, const DelayKernel& kernel, double seconds) {
  Row row;
  row.kernel = name + " = " + kernel.Describe();
  constexpr int64_t kStepNs = 20'000'000;       // 50 steps/s
  constexpr int64_t kFeedbackNs = 100'000'000;  // 10 feedback/s
  constexpr int64_t kJudgedAgoNs = 500'000'000;
  constexpr int kStepsPerRound = 50 * 60;       // one minute of session
  std::vector<Pair> pairs;
  std::vector<SessionTime> starts;

  const double t0 = CpuSeconds();
  int round = 0;
  while (round == 0 || (CpuSeconds() - t0) < seconds) {
    CreditEngine engine({kernel, Duration::Millis(500)});
    uint64_t seq = 0;
    std::vector<uint64_t> step_index;  // step sequence -> index into starts (round 0)
    const SessionTime base = SessionTime::FromNanos(1'700'000'000'000'000'000);
    for (int i = 0; i < kStepsPerRound; ++i) {
      const SessionTime start = base + Duration::Nanos(i * kStepNs);
      StepInput s{++seq, "rover-1", static_cast<uint64_t>(i), start,
                  start + Duration::Nanos(kStepNs)};
      if (round == 0) {
        if (step_index.size() <= seq) step_index.resize(seq + 1);
        step_index[seq] = starts.size();
        starts.push_back(start);
      }
      EngineOutput out = engine.AddStep(s);
      row.labels += out.labels.size();
      if ((i + 1) % (kFeedbackNs / kStepNs) == 0) {
        const SessionTime now = start + Duration::Nanos(kStepNs);
        FeedbackInput f{++seq, "ava", (i / 5) % 3 ? 1.0 : -1.0,
                        now - Duration::Nanos(kJudgedAgoNs)};
        EngineOutput fo = engine.AddFeedback(f);
        row.credits += fo.credits.size();
        row.labels += fo.labels.size();
        if (round == 0) {
          for (const CreditOut& c : fo.credits) {
            const SessionTime st = starts[step_index[c.step_sequence]];
            pairs.push_back({f.event, st, st + Duration::Nanos(kStepNs)});
          }
        }
        EngineOutput wo = engine.AdvanceWatermark(now);
        row.credits += wo.credits.size();
        row.labels += wo.labels.size();
      }
    }
    EngineOutput last =
        engine.AdvanceWatermark(base + Duration::Seconds(3600));
    row.credits += last.credits.size();
    row.labels += last.labels.size();
    ++round;
  }
  row.engine_seconds = (CpuSeconds() - t0);

  // Baseline: the same pairs, Credit() alone, for about as long.
  const double b0 = CpuSeconds();
  double sum = 0;
  do {
    for (const Pair& p : pairs) sum += Credit(kernel, p.t_f, p.start, p.end);
    row.baseline_evaluations += pairs.size();
  } while ((CpuSeconds() - b0) < seconds);
  row.baseline_seconds = (CpuSeconds() - b0);
  row.checksum = sum;
  return row;
}

double ArgSeconds(int argc, char** argv, double fallback) {
  for (int i = 1; i < argc; ++i) {
    if (std::strncmp(argv[i], "--seconds=", 10) == 0) return std::atof(argv[i] + 10);
  }
  return fallback;
}

int Main(int argc, char** argv) {
  const double seconds = ArgSeconds(argc, argv, 1.0);
  std::printf("credit_throughput: step-credits per second on one core\n");
  std::printf("workload: 50 steps/s (ends given), 10 feedback/s judged 0.5 s back, "
              "watermark follows; about %.1f s per measurement\n\n", seconds);
  std::printf("%-62s %14s %14s %7s %9s\n", "kernel", "engine/s", "Credit()/s", "ratio",
              "target");
  const struct {
    const char* name;
    DelayKernel kernel;
  } kernels[] = {
      // Warnell, Waytowich, Lawhern & Stone, AAAI 2018 (published).
      {"uniform 0.2-4 s", *DelayKernel::Uniform(Duration::Millis(200), Duration::Millis(4000))},
      // Knox & Stone, K-CAP 2009 (from memory, not verified).
      {"gamma 2, 0.28 s", *DelayKernel::Gamma(2.0, 0.28, Duration::Zero())},
  };
  for (const auto& k : kernels) {
    const Row r = Measure(k.name, k.kernel, seconds);
    const double engine_rate = static_cast<double>(r.credits) / r.engine_seconds;
    const double base_rate = static_cast<double>(r.baseline_evaluations) / r.baseline_seconds;
    std::printf("%-62s %14.3e %14.3e %7.2f %9s\n", r.kernel.c_str(), engine_rate, base_rate,
                engine_rate / base_rate, engine_rate >= 5e6 ? ">=5M ok" : ">=5M MISS");
    std::printf("  (%llu credits, %llu labels in %.2f s; baseline %llu calls in %.2f s, "
                "checksum %.6g)\n",
                static_cast<unsigned long long>(r.credits),
                static_cast<unsigned long long>(r.labels), r.engine_seconds,
                static_cast<unsigned long long>(r.baseline_evaluations), r.baseline_seconds,
                r.checksum);
  }
  std::printf("\nratio = engine step-credits/s ÷ plain Credit() calls/s over the same pairs "
              "(same run, same core); rates per second of thread CPU time\n");
  return 0;
}

}  // namespace
}  // namespace tickmark::bench

int main(int argc, char** argv) { return tickmark::bench::Main(argc, argv); }

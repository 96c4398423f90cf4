// metrics_bench: what the one-line metric calls on the hot paths cost
// (server/ops/server_metrics.h), against a baseline measured in the same run:
// one relaxed atomic add on a counter of our own. Single-threaded and with
// 4 threads counting at once (the same cache line shared, as on a busy
// server). Prints ns per call and the ratio; never asserts. Bounded: about
// 6 × --seconds (default 0.3).
#include <atomic>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <functional>
#include <thread>
#include <vector>

#include "server/ops/metrics.h"
#include "server/ops/server_metrics.h"

namespace {

using Clock = std::chrono::steady_clock;

// Calls `op` on `threads` threads for about `seconds`; ns per call.
double NanosPerCall(int threads, double seconds, const std::function<void(uint64_t)>& op) {
  std::atomic<bool> stop{false};
  std::atomic<uint64_t> calls{0};
  std::vector<std::thread> pool;
  const auto start = Clock::now();
  for (int t = 0; t < threads; ++t) {
    pool.emplace_back([&] {
      uint64_t n = 0;
      while (!stop.load(std::memory_order_relaxed)) {
        for (int i = 0; i < 1024; ++i) op(n++);
      }
      calls.fetch_add(n);
    });
  }
  std::this_thread::sleep_for(std::chrono::duration<double>(seconds));
  stop = true;
  for (auto& t : pool) t.join();
  const double ns = std::chrono::duration<double, std::nano>(Clock::now() - start).count();
  return ns * threads / static_cast<double>(calls.load());
}

}  // namespace

int main(int argc, char** argv) {
  double seconds = 0.3;
  for (int i = 1; i < argc; ++i) {
    if (std::strncmp(argv[i], "--seconds=", 10) == 0) {
      seconds = std::atof(argv[i] + 10);
    } else {
      std::fprintf(stderr, "metrics_bench [--seconds=S]  (S per case, 6 cases)\n");
      return std::strcmp(argv[i], "--help") == 0 ? 0 : 2;
    }
  }
  if (!(seconds > 0 && seconds <= 60)) seconds = 0.3;
  namespace ops = tickmark::ops;
  ops::RegisterServerMetrics();
  std::atomic<uint64_t> own{0};
  auto baseline = [&own](uint64_t) { own.fetch_add(1, std::memory_order_relaxed); };
  auto count = [](uint64_t) { ops::CountIngest(ops::IngestKind::kFeedback, 0); };
  auto observe = [](uint64_t n) {
    ops::ObserveAckLatency(ops::IngestKind::kStep, static_cast<int64_t>(n % 4096) * 1000);
  };
  std::printf("metrics_bench: ns per call, %.1f s per case (baseline: one relaxed atomic add)\n\n",
              seconds);
  std::printf("  %-36s %10s %10s %8s\n", "call", "1 thread", "4 threads", "");
  const double b1 = NanosPerCall(1, seconds, baseline);
  const double b4 = NanosPerCall(4, seconds, baseline);
  std::printf("  %-36s %10.2f %10.2f\n", "baseline atomic add", b1, b4);
  const double c1 = NanosPerCall(1, seconds, count);
  const double c4 = NanosPerCall(4, seconds, count);
  std::printf("  %-36s %10.2f %10.2f   x%.1f / x%.1f of baseline\n", "ops::CountIngest (stored)", c1,
              c4, c1 / b1, c4 / b4);
  const double o1 = NanosPerCall(1, seconds, observe);
  const double o4 = NanosPerCall(4, seconds, observe);
  std::printf("  %-36s %10.2f %10.2f   x%.1f / x%.1f of baseline\n",
              "ops::ObserveAckLatency (histogram)", o1, o4, o1 / b1, o4 / b4);
  std::printf("\n(a histogram observation is three atomic adds: bucket, sum, count; the sum is a\n"
              "compare-and-swap loop on a double, the part that grows with contention)\n");
  return 0;
}

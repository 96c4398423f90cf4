// Flood (issue 9.9): one trainer token floods feedback as fast as its
// stream allows while a well-behaved trainer sends one feedback every 20 ms
// and waits for each ack. Prints the well-behaved trainer's ack latency
// (p50, p99) without and with the flood, with the server's default rate
// limits (50 feedback/s, burst 100, per token and per stream), and the p99
// ratio (target ≤ 1.5×); then the same flood with the limits off, for
// comparison. Prints; never asserts. Bounded: about 3 × --seconds (default
// 3) plus setup.
#include <algorithm>
#include <atomic>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <memory>
#include <string>
#include <thread>
#include <vector>

#include "bench/bench_server.h"
#include "server/base/log.h"
#include "server/rpc/server.h"
#include "tests/e2e/live_stream.h"

namespace tickmark::bench {
namespace {

using e2e::Clock;
namespace v1 = tickmark::v1;

struct Phase {
  std::vector<double> latency_ms;  // the well-behaved trainer's acks
  uint64_t flood_ok = 0;
  uint64_t flood_limited = 0;
  bool ok = false;
};

double Quantile(std::vector<double> v, double q) {
  if (v.empty()) return 0;
  std::sort(v.begin(), v.end());
  const size_t i = std::min(v.size() - 1, static_cast<size_t>(q * static_cast<double>(v.size())));
  return v[i];
}

std::string IssueTrainer(v1::SessionAdmin::Stub* admin, const std::string& session,
                         const std::string& admin_secret, const std::string& subject) {
  v1::IssueTokenRequest req;
  req.set_session_id(session);
  req.set_role(v1::ROLE_TRAINER);
  req.set_subject(subject);
  v1::IssueTokenResponse resp;
  grpc::Status s = admin->IssueToken(e2e::AuthContext(admin_secret).get(), req, &resp);
  return s.ok() ? resp.secret() : "";
}

Phase Run(bool flood, bool limits, double seconds) {
  Phase out;
  auto server = BenchServer::Start(
      "flood_bench", limits ? rpc::ServerOptions() : BenchServer::WithoutRateLimits());
  if (!server) return out;
  e2e::SessionWithToken session;
  if (!server->CreateSession("flood bench", v1::ROLE_TRAINER, "calm", &session)) return out;
  const std::string flood_token =
      IssueTrainer(server->admin(), session.session_id, session.admin_secret, "flood");

  // Separate connections, as two trainers on two machines would have.
  auto channel = [&](int i) {
    grpc::ChannelArguments args;
    args.SetInt("tickmark.bench.stream", i);
    return grpc::CreateCustomChannel(server->target(), grpc::InsecureChannelCredentials(), args);
  };
  std::atomic<uint64_t> flood_ok{0}, flood_limited{0};
  e2e::TrainerStream calm(channel(0));
  e2e::TrainerStream flooder(channel(1), [&](const v1::Ack& a) {
    if (a.code() == 0) flood_ok.fetch_add(1);
    if (a.code() == static_cast<int>(grpc::StatusCode::RESOURCE_EXHAUSTED))
      flood_limited.fetch_add(1);
  });
  if (!calm.Hello(session.token, "calm-pad", Clock::now() + std::chrono::seconds(10)) ||
      !flooder.Hello(flood_token, "flood-pad", Clock::now() + std::chrono::seconds(10))) {
    std::fprintf(stderr, "flood_bench: no welcome\n");
    return out;
  }
  std::atomic<bool> stop{false};
  std::thread flood_thread;
  if (flood) {
    flood_thread = std::thread([&] {
      constexpr uint64_t kWindow = 1024;  // unacknowledged feedback in flight
      const auto deadline = Clock::now() + std::chrono::seconds(120);
      for (uint64_t seq = 1; !stop.load(); ++seq) {
        const bool room = flooder.WaitFor(
            [&](const e2e::TrainerStream::State& st) {
              return st.ended || stop.load() || seq - 1 - st.acks.size() < kWindow;
            },
            deadline);
        if (!room || stop.load() || !flooder.Send(e2e::Feedback(seq, 1.0, "key:flood"))) break;
      }
    });
  }
  // Warm-up: connections, first clock probes, the flood under way.
  std::this_thread::sleep_for(std::chrono::milliseconds(500));
  const auto end = Clock::now() + std::chrono::duration_cast<Clock::duration>(
                                      std::chrono::duration<double>(seconds));
  uint64_t seq = 0;
  while (Clock::now() < end) {
    ++seq;
    const auto sent = Clock::now();
    if (!calm.Send(e2e::Feedback(seq, -1.0, "key:calm"))) break;
    const bool acked = calm.WaitFor(
        [&](const e2e::TrainerStream::State& st) { return st.ended || st.acks.size() >= seq; },
        Clock::now() + std::chrono::seconds(10));
    if (!acked) break;
    out.latency_ms.push_back(
        std::chrono::duration<double, std::milli>(Clock::now() - sent).count());
    std::this_thread::sleep_until(sent + std::chrono::milliseconds(20));
  }
  stop = true;
  flooder.Cancel();
  if (flood_thread.joinable()) flood_thread.join();
  calm.Finish();
  flooder.Finish();
  out.flood_ok = flood_ok.load();
  out.flood_limited = flood_limited.load();
  out.ok = !out.latency_ms.empty();
  return out;
}

}  // namespace
}  // namespace tickmark::bench

int main(int argc, char** argv) {
  using namespace tickmark::bench;
  double seconds = 3;
  for (int i = 1; i < argc; ++i) {
    if (std::strncmp(argv[i], "--seconds=", 10) == 0) {
      seconds = std::atof(argv[i] + 10);
    } else {
      std::fprintf(stderr, "flood_bench [--seconds=S]\n");
      return std::strcmp(argv[i], "--help") == 0 ? 0 : 2;
    }
  }
  if (!(seconds > 0 && seconds < 600)) seconds = 3;
  tickmark::SetLogLevel(tickmark::LogLevel::kWarning);
  const Phase quiet = Run(false, true, seconds);
  const Phase loud = Run(true, true, seconds);
  const Phase open = Run(true, false, seconds);

  std::printf(
      "flood_bench: a well-behaved trainer (1 feedback / 20 ms, waits for each ack)\n"
      "next to one trainer token flooding feedback (1024 in flight), in-process\n"
      "tickmarkd on loopback, %.1f s per phase\n\n",
      seconds);
  std::printf("  %-34s %8s %9s %9s %12s %12s\n", "phase", "acks", "p50 ms", "p99 ms", "flood ok",
              "flood 429s");
  auto row = [](const char* what, const Phase& p) {
    std::printf("  %-34s %8zu %9.3f %9.3f %12llu %12llu\n", what, p.latency_ms.size(),
                Quantile(p.latency_ms, 0.5), Quantile(p.latency_ms, 0.99),
                static_cast<unsigned long long>(p.flood_ok),
                static_cast<unsigned long long>(p.flood_limited));
  };
  row("no flood (default limits)", quiet);
  row("flood (default limits)", loud);
  row("flood (rate limits off)", open);
  const double base = Quantile(quiet.latency_ms, 0.99);
  if (base > 0) {
    std::printf("\n  p99 ratio, flood / no flood, default limits: %.2fx (target <= 1.5x)\n",
                Quantile(loud.latency_ms, 0.99) / base);
    std::printf("  p99 ratio, flood / no flood, limits off:     %.2fx\n",
                Quantile(open.latency_ms, 0.99) / base);
  }
  std::printf("  (flood 429s: acks with RESOURCE_EXHAUSTED)\n");
  return 0;
}

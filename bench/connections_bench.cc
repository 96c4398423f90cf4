// Many trainer connections (issue 16): N separate client connections, each
// one trainer stream sending 2 feedback/s and answering the server's clock
// probes, against an in-process tickmarkd on loopback. The clients run in a
// second process (this program started again with --client), so the server's
// CPU and memory can be told apart from the clients'.
//
// Each connection is its own gRPC channel with distinct channel arguments,
// so gRPC cannot share one HTTP/2 connection (one subchannel) between them:
// N TCP connections, N file descriptors in each process (RLIMIT_NOFILE is
// raised to its hard limit in both). The client side uses the callback API,
// so it needs no thread per connection either.
//
// Per N it prints: ack latency p50/p99 (send -> Ack, on the client's
// CLOCK_MONOTONIC), the server's RSS and CPU (per 1k connections), the
// client process's CPU, and the server's thread count (a thread per
// connection would show here). Baseline measured in the same run: the same
// ack latency with one connection at the same 2 feedback/s.
//
// Targets: 10k connections at 2/s, ack p99 <= 5 ms, server RSS <= 2 GiB.
// Prints; never asserts. Bounded: about (connect + --seconds + 2 s) per N.
#include <grpcpp/grpcpp.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <condition_variable>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <memory>
#include <mutex>
#include <sstream>
#include <string>
#include <thread>
#include <vector>

#include "bench/bench_server.h"
#include "bench/proc_stats.h"
#include "server/base/log.h"
#include "server/rpc/server.h"
#include "tests/e2e/live_stream.h"

namespace tickmark::bench {
namespace {

namespace v1 = tickmark::v1;
using e2e::Clock;
using e2e::MonotonicNanos;

// Raises the open-file limit to the hard limit; returns the soft limit now.
rlim_t RaiseFileLimit() {
  rlimit rl{};
  if (getrlimit(RLIMIT_NOFILE, &rl) != 0) return 0;
  if (rl.rlim_cur < rl.rlim_max) {
    rl.rlim_cur = rl.rlim_max;
    setrlimit(RLIMIT_NOFILE, &rl);
    getrlimit(RLIMIT_NOFILE, &rl);
  }
  return rl.rlim_cur;
}

double Percentile(std::vector<int64_t> v, double p) {
  if (v.empty()) return 0;
  std::sort(v.begin(), v.end());
  const auto i = static_cast<size_t>(p * static_cast<double>(v.size() - 1) + 0.5);
  return static_cast<double>(v[std::min(i, v.size() - 1)]) * 1e-3;  // µs
}

// ---------------------------------------------------------------- client side

// One trainer connection on the callback API: Hello, then feedback when the
// pacer says, probe replies at once. Writes are queued (one in flight).
class Conn final : public grpc::ClientBidiReactor<v1::TrainerMessage, v1::ServerMessage> {
 public:
  Conn(std::shared_ptr<grpc::Channel> channel, const std::string& token, int index)
      : channel_(std::move(channel)), stub_(v1::Live::NewStub(channel_)), index_(index) {
    ctx_.AddMetadata("authorization", "Bearer " + token);
    ctx_.AddMetadata("tickmark-ack-batch", "1");
    stub_->async()->Train(&ctx_, this);
    StartRead(&in_);
    v1::TrainerMessage hello;
    v1::Hello* h = hello.mutable_hello();
    h->set_token(token);
    // Unique per client process: each row of the table is a new set of clients
    // (a client id reused with sequence 1 again would be a resend).
    h->set_client_id("conn-" + std::to_string(getpid()) + "-" + std::to_string(index));
    h->set_source_kind(v1::SOURCE_KIND_SCRIPT);
    h->set_source_description("connections_bench");
    h->set_software("tickmark-bench");
    h->set_sent_client_ns(MonotonicNanos());
    Send(std::move(hello));
    StartCall();
  }

  void SendFeedback() {
    if (!welcomed_.load() || done_.load()) return;
    const uint64_t seq = ++seq_;
    v1::TrainerMessage m = e2e::Feedback(seq, seq % 2 ? 1.0 : -1.0, "key:g");
    sent_ns_[seq % kSlots].store(MonotonicNanos());
    Send(std::move(m));
  }

  void Cancel() { ctx_.TryCancel(); }
  bool welcomed() const { return welcomed_.load(); }
  bool done() const { return done_.load(); }
  // Moves the measured latencies out.
  std::vector<int64_t> TakeLatencies() {
    std::lock_guard<std::mutex> lock(lat_mu_);
    return std::move(latencies_);
  }
  void SetMeasuring(bool on) { measuring_.store(on); }
  uint64_t errors() const { return errors_.load(); }

  void WaitDone() {
    std::unique_lock<std::mutex> lock(mu_);
    cv_.wait(lock, [this] { return done_.load(); });
  }

  void OnReadDone(bool ok) override {
    if (!ok) return;
    const int64_t now = MonotonicNanos();
    if (in_.has_probe()) {
      v1::TrainerMessage reply;
      v1::ProbeReply* p = reply.mutable_probe_reply();
      p->set_probe_id(in_.probe().probe_id());
      p->set_t1_session_ns(in_.probe().t1_session_ns());
      p->set_t2_client_ns(now);
      p->set_t3_client_ns(MonotonicNanos());
      Send(std::move(reply));
    } else if (in_.has_welcome()) {
      welcomed_.store(true);
    } else if (in_.has_ack()) {
      NoteAck(in_.ack(), now);
    } else if (in_.has_ack_batch()) {
      for (const v1::Ack& a : in_.ack_batch().acks()) NoteAck(a, now);
    }
    StartRead(&in_);
  }

  void OnWriteDone(bool ok) override {
    std::lock_guard<std::mutex> lock(mu_);
    if (!ok || queue_.empty()) {
      writing_ = false;
      return;
    }
    current_ = std::move(queue_.front());
    queue_.erase(queue_.begin());
    StartWrite(&current_);
  }

  void OnDone(const grpc::Status&) override {
    std::lock_guard<std::mutex> lock(mu_);
    done_.store(true);
    cv_.notify_all();
  }

 private:
  static constexpr size_t kSlots = 64;

  void Send(v1::TrainerMessage m) {
    std::lock_guard<std::mutex> lock(mu_);
    if (done_.load()) return;
    if (writing_) {
      queue_.push_back(std::move(m));
      return;
    }
    writing_ = true;
    current_ = std::move(m);
    StartWrite(&current_);
  }

  void NoteAck(const v1::Ack& a, int64_t now) {
    if (a.code() != 0) {
      if (errors_.fetch_add(1) == 0 && index_ < 3) {
        std::fprintf(stderr, "connections_bench: conn %d: ack %d: %s\n", index_, a.code(),
                     a.message().c_str());
      }
      return;
    }
    if (!measuring_.load()) return;
    const int64_t sent = sent_ns_[a.client_sequence() % kSlots].load();
    if (sent == 0) return;
    std::lock_guard<std::mutex> lock(lat_mu_);
    latencies_.push_back(now - sent);
  }

  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<v1::Live::Stub> stub_;
  const int index_;
  grpc::ClientContext ctx_;
  v1::ServerMessage in_;  // the read in flight

  std::mutex mu_;
  std::condition_variable cv_;
  bool writing_ = false;                   // GUARDED_BY(mu_)
  v1::TrainerMessage current_;             // the write in flight
  std::vector<v1::TrainerMessage> queue_;  // GUARDED_BY(mu_)
  std::atomic<bool> done_{false};
  std::atomic<bool> welcomed_{false};
  std::atomic<bool> measuring_{false};
  std::atomic<uint64_t> errors_{0};
  uint64_t seq_ = 0;  // pacer thread only
  std::atomic<int64_t> sent_ns_[kSlots] = {};

  std::mutex lat_mu_;
  std::vector<int64_t> latencies_;  // GUARDED_BY(lat_mu_)
};

// The client process: opens n connections, waits for their welcomes, sends
// for warm-up + seconds, prints "RESULT connected p50_us p99_us samples
// errors" and one "PHASE ..." line per step so the server can time its own
// measurement window. Reads nothing else.
int RunClient(const std::string& target, const std::string& token, int n, double seconds,
              double rate) {
  RaiseFileLimit();
  std::vector<std::unique_ptr<Conn>> conns;
  conns.reserve(static_cast<size_t>(n));
  const auto connect_deadline = Clock::now() + std::chrono::seconds(90);
  for (int i = 0; i < n; ++i) {
    grpc::ChannelArguments args;
    args.SetInt("tickmark.bench.connection", i);  // distinct: no shared subchannel
    args.SetInt(GRPC_ARG_USE_LOCAL_SUBCHANNEL_POOL, 1);
    auto channel = grpc::CreateCustomChannel(target, grpc::InsecureChannelCredentials(), args);
    conns.push_back(std::make_unique<Conn>(std::move(channel), token, i));
    // Open in waves so the listen backlog and the server's accept loop keep up.
    if (i % 200 == 199) {
      while (Clock::now() < connect_deadline) {
        int ready = 0;
        for (int j = std::max(0, i - 199); j <= i; ++j) {
          ready +=
              conns[static_cast<size_t>(j)]->welcomed() || conns[static_cast<size_t>(j)]->done();
        }
        if (ready == 200) break;
        std::this_thread::sleep_for(std::chrono::milliseconds(5));
      }
    }
  }
  while (Clock::now() < connect_deadline) {
    int ready = 0;
    for (auto& c : conns) ready += c->welcomed() || c->done();
    if (ready == n) break;
    std::this_thread::sleep_for(std::chrono::milliseconds(20));
  }
  int connected = 0;
  for (auto& c : conns) connected += c->welcomed() && !c->done();
  std::printf("PHASE connected %d\n", connected);
  std::fflush(stdout);

  // Each connection sends every 1/rate s, phases spread evenly.
  const int64_t period_ns = static_cast<int64_t>(1e9 / rate);
  const double warmup = 2.0;
  const int64_t start = MonotonicNanos();
  const int64_t measure_from = start + static_cast<int64_t>(warmup * 1e9);
  const int64_t end = measure_from + static_cast<int64_t>(seconds * 1e9);
  std::vector<int64_t> next(static_cast<size_t>(n));
  for (int i = 0; i < n; ++i) {
    next[static_cast<size_t>(i)] = start + period_ns * i / std::max(1, n);
  }
  bool measuring = false;
  while (true) {
    const int64_t now = MonotonicNanos();
    if (now >= end) break;
    if (!measuring && now >= measure_from) {
      measuring = true;
      for (auto& c : conns) c->SetMeasuring(true);
      std::printf("PHASE measuring\n");
      std::fflush(stdout);
    }
    for (int i = 0; i < n; ++i) {
      if (next[static_cast<size_t>(i)] <= now) {
        conns[static_cast<size_t>(i)]->SendFeedback();
        next[static_cast<size_t>(i)] += period_ns;
      }
    }
    std::this_thread::sleep_for(std::chrono::microseconds(500));
  }
  std::this_thread::sleep_for(std::chrono::milliseconds(300));  // last acks
  for (auto& c : conns) c->SetMeasuring(false);
  std::printf("PHASE done\n");
  std::fflush(stdout);
  std::vector<int64_t> all;
  uint64_t errors = 0;
  for (auto& c : conns) {
    auto v = c->TakeLatencies();
    all.insert(all.end(), v.begin(), v.end());
    errors += c->errors();
  }
  const double client_cpu = CpuSeconds(0);
  std::printf("RESULT %d %.1f %.1f %zu %llu %.2f %ld\n", connected, Percentile(all, 0.5),
              Percentile(all, 0.99), all.size(), static_cast<unsigned long long>(errors),
              client_cpu, StatusField(0, "Threads"));
  std::fflush(stdout);
  for (auto& c : conns) c->Cancel();
  for (auto& c : conns) c->WaitDone();
  return 0;
}

// ---------------------------------------------------------------- server side

struct Row {
  int n = 0;
  int connected = 0;
  double p50_us = 0, p99_us = 0;
  size_t samples = 0;
  unsigned long long errors = 0;
  double server_cpu_per_s = 0;  // cores, over the measuring window
  double client_cpu_per_s = 0;
  long server_rss_kb = 0;
  long server_threads = 0;
  long client_threads = 0;
};

// Starts the client process for n connections and reads its lines; times
// the server's own CPU over the client's measuring window.
bool RunPhase(const std::string& self, const std::string& target, const std::string& token, int n,
              double seconds, double rate, Row* row) {
  pid_t pid = 0;
  FILE* in =
      StartSelf(self,
                {"--client", "--target=" + target, "--token=" + token, "--n=" + std::to_string(n),
                 "--seconds=" + std::to_string(seconds), "--rate=" + std::to_string(rate)},
                &pid);
  if (in == nullptr) return false;
  row->n = n;
  char line[512];
  double cpu0 = 0, ccpu0 = 0;
  auto t0 = Clock::now();
  bool got = false;
  while (std::fgets(line, sizeof line, in) != nullptr) {
    if (std::strncmp(line, "PHASE measuring", 15) == 0) {
      cpu0 = CpuSeconds(0);
      ccpu0 = CpuSeconds(pid);
      t0 = Clock::now();
    } else if (std::strncmp(line, "PHASE done", 10) == 0) {
      const double wall = std::chrono::duration<double>(Clock::now() - t0).count();
      row->server_cpu_per_s = (CpuSeconds(0) - cpu0) / wall;
      row->client_cpu_per_s = (CpuSeconds(pid) - ccpu0) / wall;
      row->server_rss_kb = StatusField(0, "VmRSS");
      row->server_threads = StatusField(0, "Threads");
      row->client_threads = StatusField(pid, "Threads");
    } else if (std::strncmp(line, "RESULT ", 7) == 0) {
      double cpu = 0;
      long threads = 0;
      std::sscanf(line + 7, "%d %lf %lf %zu %llu %lf %ld", &row->connected, &row->p50_us,
                  &row->p99_us, &row->samples, &row->errors, &cpu, &threads);
      got = true;
    }
  }
  std::fclose(in);
  int status = 0;
  waitpid(pid, &status, 0);
  return got;
}

void Usage() {
  std::printf(
      "connections_bench [--n=1000,5000,10000] [--seconds=S] [--rate=R] [--smoke]\n"
      "  N separate trainer connections (a client process of their own), each sending\n"
      "  R feedback/s (default 2) with clock probes running, to an in-process tickmarkd.\n"
      "  Prints ack latency p50/p99, server RSS and CPU per 1k connections and thread\n"
      "  counts, against one connection measured in the same run. Asserts nothing.\n"
      "  --smoke: 50 connections for 1 s (what ./run test runs).\n");
}

int Main(int argc, char** argv) {
  std::vector<int> ns = {1000, 5000, 10000};
  double seconds = 8, rate = 2;
  bool client = false;
  std::string target, token;
  int client_n = 0;
  for (int i = 1; i < argc; ++i) {
    const std::string a = argv[i];
    if (a == "--client") {
      client = true;
    } else if (a.rfind("--target=", 0) == 0) {
      target = a.substr(9);
    } else if (a.rfind("--token=", 0) == 0) {
      token = a.substr(8);
    } else if (a.rfind("--n=", 0) == 0) {
      ns.clear();
      std::stringstream list(a.substr(4));
      for (std::string item; std::getline(list, item, ',');) ns.push_back(std::atoi(item.c_str()));
      client_n = ns.empty() ? 0 : ns.front();
    } else if (a.rfind("--seconds=", 0) == 0) {
      seconds = std::atof(a.c_str() + 10);
    } else if (a.rfind("--rate=", 0) == 0) {
      rate = std::atof(a.c_str() + 7);
    } else if (a == "--smoke") {
      ns = {50};
      seconds = 1;
    } else {
      Usage();
      return a == "--help" || a == "-h" ? 0 : 2;
    }
  }
  if (seconds <= 0 || seconds > 120 || rate <= 0 || rate > 1000 || ns.empty() ||
      *std::min_element(ns.begin(), ns.end()) < 1) {
    Usage();
    return 2;
  }
  if (client) return RunClient(target, token, client_n, seconds, rate);

  tickmark::SetLogLevel(tickmark::LogLevel::kWarning);
  const rlim_t files = RaiseFileLimit();
  rpc::ServerOptions options;
  // Every connection comes from this host: no caps on stream counts. The
  // rate limits stay on per stream (2/s is far below them); the per-token
  // bucket is off because all connections share one token here.
  options.live.max_streams = 0;
  options.live.max_streams_per_peer = 0;
  options.live.feedback_rate = 0;
  auto server = BenchServer::Start("connections_bench", options);
  if (!server) return 1;
  target = server->target();
  e2e::SessionWithToken session;
  if (!server->CreateSession("connections bench", v1::ROLE_TRAINER, "ava", &session)) return 1;
  char self[4096];
  const ssize_t len = readlink("/proc/self/exe", self, sizeof self - 1);
  if (len <= 0) return 1;
  self[len] = '\0';

  std::printf(
      "connections_bench: separate trainer connections at %.1f feedback/s each, probes "
      "on; clients in a second process; %.0f s measured per row; %u hardware threads; "
      "open-file limit %llu\n\n",
      rate, seconds, std::thread::hardware_concurrency(), static_cast<unsigned long long>(files));
  const long rss_idle_kb = StatusField(0, "VmRSS");
  std::vector<Row> rows;
  Row base;
  if (!RunPhase(self, target, session.token, 1, seconds, rate, &base)) {
    std::fprintf(stderr, "connections_bench: the one-connection baseline failed\n");
  }
  for (int n : ns) {
    Row r;
    if (!RunPhase(self, target, session.token, n, seconds, rate, &r)) {
      std::fprintf(stderr, "connections_bench: the client process for %d failed\n", n);
      continue;
    }
    rows.push_back(r);
  }
  std::printf("%-7s %9s %9s %9s %8s %6s %9s %11s %9s %11s %7s %7s\n", "conns", "connected",
              "p50 µs", "p99 µs", "acks", "errors", "srv RSS", "MiB/1k", "srv CPU", "CPU/1k",
              "srv thr", "cli CPU");
  auto print = [](const Row& r, long rss_idle) {
    const double k = std::max(1, r.connected) / 1000.0;
    std::printf("%-7d %9d %9.0f %9.0f %8zu %6llu %7.0f M %11.1f %8.2f %11.3f %7ld %7.2f\n", r.n,
                r.connected, r.p50_us, r.p99_us, r.samples, r.errors,
                static_cast<double>(r.server_rss_kb) / 1024.0,
                static_cast<double>(r.server_rss_kb - rss_idle) / 1024.0 / k, r.server_cpu_per_s,
                r.server_cpu_per_s / k, r.server_threads, r.client_cpu_per_s);
  };
  print(base, rss_idle_kb);
  for (const Row& r : rows) print(r, rss_idle_kb);
  std::printf(
      "\n(CPU in cores busy over the measured window; MiB/1k is RSS above the idle "
      "server's %.0f MiB, per 1k connections; srv thr: the server's threads)\n",
      static_cast<double>(rss_idle_kb) / 1024.0);
  // Targets, at the largest N run.
  if (!rows.empty()) {
    const Row& top = *std::max_element(rows.begin(), rows.end(),
                                       [](const Row& a, const Row& b) { return a.n < b.n; });
    const bool all_in = top.connected == top.n;
    const bool p99_ok = top.p99_us <= 5000 && top.samples > 0;
    const bool rss_ok = top.server_rss_kb <= 2L * 1024 * 1024;
    std::printf("targets at %d connections (%d connected):\n", top.n, top.connected);
    std::printf("  all connected, none refused: %s\n", all_in ? "met" : "NOT met");
    std::printf("  ack p99 %.2f ms <= 5 ms (%.1f× the one-connection p99 %.2f ms): %s\n",
                top.p99_us / 1000, base.p99_us > 0 ? top.p99_us / base.p99_us : 0,
                base.p99_us / 1000, p99_ok ? "met" : "NOT met");
    std::printf("  server RSS %.0f MiB <= 2048 MiB: %s\n",
                static_cast<double>(top.server_rss_kb) / 1024.0, rss_ok ? "met" : "NOT met");
    std::printf("  no thread per connection: server %ld threads for %d connections: %s\n",
                top.server_threads, top.connected,
                top.server_threads < std::max(64, top.connected / 4) ? "met" : "NOT met");
    const double total = top.server_cpu_per_s + top.client_cpu_per_s;
    if (total > 0) {
      std::printf("  CPU: server %.2f cores, clients %.2f cores (%.0f%% clients) of %u\n",
                  top.server_cpu_per_s, top.client_cpu_per_s, 100 * top.client_cpu_per_s / total,
                  std::thread::hardware_concurrency());
    }
  }
  std::printf(
      "\nprofile (perf over this bench at 1k connections, December 2026; DEVELOPERS.md,\n"
      "Performance): the kernel ~50%% (one TCP connection per client: every message its own\n"
      "send and receive, epoll), gRPC ~16%%, malloc ~9%%, SQLite ~7%%. The ledger writer took\n"
      "~20%% of the process, a quarter of it rewriting the side file each time it caught up\n"
      "(now at most every 20 ms). Each client is probed too: at the steady 1 s that was as\n"
      "many probes (and twice as many records) as feedback at 10k connections; past the\n"
      "probe budget a client is now probed less often, down to once per 5 s. At 5k and 10k\n"
      "connections the two cores are saturated (server ~1.2 cores, clients ~0.7): the\n"
      "offered 20k feedback/s plus probes is more than they carry, so acks queue for seconds\n"
      "and the p99 target is out of reach here. Thread count stays flat: no thread per\n"
      "connection.\n");
  return 0;
}

}  // namespace
}  // namespace tickmark::bench

int main(int argc, char** argv) { return tickmark::bench::Main(argc, argv); }

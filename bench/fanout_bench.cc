// Fan-out latency (docs/architecture.md §6, §9), in-process tickmarkd on loopback.
//
// 1. One agent publishes steps at a fixed rate to a session with 64
//    subscribers. Delivery latency = subscriber receipt − the agent's send,
//    both on CLOCK_MONOTONIC of this process. Two kinds of phase, same run,
//    same 63 measured subscribers, run A B A B (a new session each): A, all
//    64 read; B, subscriber 0 never reads (stalled). Target: p99 B ÷ p99 A
//    <= 1.5.
// 2. A trainer sends feedback; a subscriber waits for the first
//    CreditUpdate of each (ingest, commit, credit engine, second commit,
//    fan-out). Its p99 against a bare gRPC bidi ping-pong (the same
//    serialised feedback message echoed by a generic callback service on
//    another port of this process), measured in this run. Target: <= 5×.
//    The same phase runs again on a second server whose SQLite writer never
//    restarts the WAL during the bench: the path without its one stall.
//
// The stalled phase runs with a per-subscriber buffer of --buffer records
// (default 256) so the stalled subscriber overflows into ledger catch-up, as
// a real one would after a while. Clients and server share the machine's two
// cores. Bounded: about 7 × --seconds (default 2) plus setup. Prints; never
// asserts.
#include <grpcpp/generic/async_generic_service.h>
#include <grpcpp/generic/generic_stub.h>
#include <grpcpp/grpcpp.h>
#include <time.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <map>
#include <memory>
#include <mutex>
#include <string>
#include <thread>
#include <vector>

#include "bench/bench_server.h"
#include "server/base/log.h"
#include "server/rpc/server.h"
#include "tests/e2e/live_stream.h"

namespace tickmark::bench {
namespace {

namespace v1 = tickmark::v1;
using e2e::Clock;
using e2e::MonotonicNanos;

struct Config {
  double seconds = 2.0;  // per phase
  int subscribers = 64;
  int steps_per_second = 200;
  size_t state_bytes = 1024;       // per step, so a stalled stream fills its window
  size_t buffer = 256;             // server's per-subscriber live buffer
  int feedback_per_second = 1000;  // the target's rate (issue 16)
  bool per_record = false;         // credit phase: Subscribe (one record a message)
  bool credit_only = false;        // skip the step fan-out phase (for profiling)
};

double Percentile(std::vector<int64_t> v, double p) {
  if (v.empty()) return 0;
  std::sort(v.begin(), v.end());
  const auto i = static_cast<size_t>(p * static_cast<double>(v.size() - 1) + 0.5);
  return static_cast<double>(v[std::min(i, v.size() - 1)]) * 1e-3;  // µs
}

struct Stats {
  size_t n = 0;
  double p50_us = 0, p99_us = 0, max_us = 0;
};

Stats Summarise(const std::vector<int64_t>& ns) {
  return {ns.size(), Percentile(ns, 0.5), Percentile(ns, 0.99), Percentile(ns, 1.0)};
}

// A session with an admin secret, for one phase.
struct Session {
  std::string id, admin;
};

class Bench {
 public:
  Bench(std::shared_ptr<grpc::Channel> channel, std::string operator_token, Config config)
      : channel_(std::move(channel)),
        admin_(v1::SessionAdmin::NewStub(channel_)),
        live_(v1::Live::NewStub(channel_)),
        operator_token_(std::move(operator_token)),
        config_(config) {}

  bool NewSession(const std::string& title, Session* s) {
    v1::CreateSessionRequest req;
    req.set_title(title);
    v1::CreateSessionResponse resp;
    grpc::Status st = admin_->CreateSession(e2e::AuthContext(operator_token_).get(), req, &resp);
    if (!st.ok()) {
      std::fprintf(stderr, "fanout_bench: create session: %s\n", st.error_message().c_str());
      return false;
    }
    s->id = resp.session().id();
    s->admin = resp.admin_secret();
    return true;
  }

  std::string Token(const Session& s, v1::Role role, const std::string& subject) {
    v1::IssueTokenRequest req;
    req.set_session_id(s.id);
    req.set_role(role);
    req.set_subject(subject);
    v1::IssueTokenResponse resp;
    grpc::Status st = admin_->IssueToken(e2e::AuthContext(s.admin).get(), req, &resp);
    if (!st.ok()) std::fprintf(stderr, "fanout_bench: token: %s\n", st.error_message().c_str());
    return resp.secret();
  }

  // Phase 1: returns the latencies of subscribers 1..n-1 (subscriber 0 is
  // stalled when `stall_first`).
  std::vector<int64_t> StepDelivery(bool stall_first) {
    std::vector<int64_t> out;
    Session s;
    if (!NewSession(stall_first ? "fanout, one stalled" : "fanout, none stalled", &s)) return out;
    const std::string agent_token = Token(s, v1::ROLE_AGENT, "rover-1");
    const std::string observer = Token(s, v1::ROLE_OBSERVER, "");
    const int n = config_.subscribers;
    const int total_steps = static_cast<int>(config_.seconds * config_.steps_per_second);
    const int warmup = config_.steps_per_second / 2;  // the first half second is not counted
    // send_ns[i]: when step i was handed to gRPC.
    std::vector<std::atomic<int64_t>> send_ns(static_cast<size_t>(total_steps + 1));
    std::vector<std::vector<std::pair<uint64_t, int64_t>>> got(static_cast<size_t>(n));
    std::vector<std::unique_ptr<grpc::ClientContext>> contexts;
    std::vector<std::unique_ptr<grpc::ClientReader<v1::Record>>> readers;
    for (int i = 0; i < n; ++i) {
      v1::SubscribeRequest req;
      req.set_session_id(s.id);
      req.add_kinds(v1::RECORD_KIND_STEP);
      if (stall_first && i == 0) req.clear_kinds();  // everything, never read
      contexts.push_back(e2e::AuthContext(observer, std::chrono::seconds(120)));
      readers.push_back(live_->Subscribe(contexts.back().get(), req));
    }
    std::vector<std::thread> threads;
    std::atomic<int> finished{0};  // readers that saw the last step
    for (int i = (stall_first ? 1 : 0); i < n; ++i) {
      threads.emplace_back([&, i] {
        auto& mine = got[static_cast<size_t>(i)];
        mine.reserve(static_cast<size_t>(total_steps));
        v1::Record r;
        while (readers[static_cast<size_t>(i)]->Read(&r)) {
          if (!r.has_step()) continue;
          mine.emplace_back(r.step().step_id(), MonotonicNanos());
          if (r.step().step_id() == static_cast<uint64_t>(total_steps)) {
            finished.fetch_add(1);
            break;
          }
        }
      });
    }

    e2e::AgentStream agent(channel_, {}, std::chrono::seconds(120));
    if (!agent.Hello(agent_token, "rover-1", Clock::now() + std::chrono::seconds(10))) {
      std::fprintf(stderr, "fanout_bench: agent hello failed\n");
    }
    const std::string state(config_.state_bytes, 's');
    const auto period = std::chrono::nanoseconds(1'000'000'000 / config_.steps_per_second);
    auto next = Clock::now();
    for (int i = 1; i <= total_steps; ++i) {
      std::this_thread::sleep_until(next);  // pacing the agent, not waiting for a result
      next += period;
      v1::AgentMessage m;
      v1::StepMessage* st = m.mutable_step();
      st->set_client_sequence(static_cast<uint64_t>(i));
      st->set_step_id(static_cast<uint64_t>(i));
      st->set_start_agent_ns(MonotonicNanos());
      st->set_action(i % 5 ? "north" : "wait");
      st->set_state(state);
      send_ns[static_cast<size_t>(i)].store(MonotonicNanos());
      if (!agent.Send(m)) break;
    }
    // Until every reading subscriber has the last step, at most 30 s.
    const int readers_expected = static_cast<int>(threads.size());
    const auto deadline = Clock::now() + std::chrono::seconds(30);
    while (finished.load() < readers_expected && Clock::now() < deadline) {
      std::this_thread::sleep_for(std::chrono::milliseconds(10));
    }
    if (finished.load() < readers_expected) {
      std::fprintf(stderr, "fanout_bench: %d of %d subscribers did not get every step\n",
                   readers_expected - finished.load(), readers_expected);
    }
    for (auto& c : contexts) c->TryCancel();
    for (auto& t : threads) t.join();
    agent.Finish();
    for (auto& r : readers) r->Finish();
    for (int i = 1; i < n; ++i) {  // the same 63 subscribers in both phases
      for (const auto& [id, at] : got[static_cast<size_t>(i)]) {
        if (id <= static_cast<uint64_t>(warmup)) continue;
        out.push_back(at - send_ns[id].load());
      }
    }
    return out;
  }

  // Phase 2: trainer feedback to the first CreditUpdate of it, at one
  // subscriber.
  // `acks` gets send -> ack (one ledger commit) of the same feedback.
  std::vector<int64_t> CreditLatency(std::vector<int64_t>* acks) {
    std::vector<int64_t> out;
    Session s;
    if (!NewSession("fanout, credit latency", &s)) return out;
    const std::string agent_token = Token(s, v1::ROLE_AGENT, "rover-1");
    const std::string trainer_token = Token(s, v1::ROLE_TRAINER, "ava");
    const std::string observer = Token(s, v1::ROLE_OBSERVER, "");
    // 5 s of 100 ms steps (ends given) up to now: every feedback judged 1 s
    // back has closed steps in reach (about 30 with the default uniform
    // 0.2–4 s kernel), so its credit is computed on arrival.
    {
      e2e::AgentStream agent(channel_);
      if (!agent.Hello(agent_token, "rover-1", Clock::now() + std::chrono::seconds(10))) {
        std::fprintf(stderr, "fanout_bench: agent hello failed\n");
        return out;
      }
      const int64_t base = MonotonicNanos() - 5'000'000'000;
      for (uint64_t i = 1; i <= 50; ++i) {
        v1::AgentMessage m;
        v1::StepMessage* st = m.mutable_step();
        st->set_client_sequence(i);
        st->set_step_id(i);
        st->set_start_agent_ns(base + static_cast<int64_t>(i - 1) * 100'000'000);
        st->set_end_agent_ns(base + static_cast<int64_t>(i) * 100'000'000);
        st->set_action("north");
        agent.Send(m);
      }
      agent.WaitFor([](const e2e::AgentStream::State& st) { return st.acks.size() >= 50; },
                    Clock::now() + std::chrono::seconds(20));
      agent.Finish();
    }
    const int total = static_cast<int>(config_.seconds * config_.feedback_per_second);
    // Client sequence 1 is a warm-up; 2..total+1 are measured.
    std::vector<std::atomic<int64_t>> send_ns(static_cast<size_t>(total + 2));
    v1::SubscribeRequest req;
    req.set_session_id(s.id);
    req.set_from_sequence(0);
    req.add_kinds(v1::RECORD_KIND_FEEDBACK);
    req.add_kinds(v1::RECORD_KIND_CREDIT);
    auto ctx = e2e::AuthContext(observer, std::chrono::seconds(120));
    std::thread sub([&] {
      std::map<uint64_t, uint64_t> cseq_of;  // feedback sequence -> client sequence
      size_t done = 0;
      auto take = [&](const v1::Record& r, int64_t now) {
        if (r.has_feedback()) {
          cseq_of[r.sequence()] = r.feedback().client_sequence();
        } else if (r.has_credit()) {
          auto it = cseq_of.find(r.credit().feedback_sequence());
          if (it == cseq_of.end()) return;  // not the first credit of it
          if (it->second != 1) {
            out.push_back(now - send_ns[it->second].load());
            ++done;
          }
          cseq_of.erase(it);
        }
      };
      if (config_.per_record) {
        auto reader = live_->Subscribe(ctx.get(), req);
        v1::Record r;
        while (done < static_cast<size_t>(total) && reader->Read(&r)) take(r, MonotonicNanos());
        ctx->TryCancel();
        reader->Finish();
      } else {
        auto reader = live_->SubscribeBatches(ctx.get(), req);
        v1::RecordBatch b;
        while (done < static_cast<size_t>(total) && reader->Read(&b)) {
          const int64_t now = MonotonicNanos();
          for (const v1::Record& r : b.records()) take(r, now);
        }
        ctx->TryCancel();
        reader->Finish();
      }
    });
    std::vector<std::atomic<int64_t>> ack_ns(static_cast<size_t>(total + 2));
    e2e::TrainerStream trainer(
        channel_,
        [&ack_ns](const v1::Ack& a) {
          if (a.client_sequence() < ack_ns.size())
            ack_ns[a.client_sequence()].store(MonotonicNanos());
        },
        std::chrono::seconds(120));
    if (!trainer.Hello(trainer_token, "ava-pad", Clock::now() + std::chrono::seconds(10))) {
      std::fprintf(stderr, "fanout_bench: trainer hello failed\n");
    }
    // A warm-up feedback: once it is acknowledged the clock model exists, so
    // no measured feedback waits for the first probe.
    {
      v1::TrainerMessage m = e2e::Feedback(1, 1.0, "key:g");
      m.mutable_feedback()->set_event_source_ns(MonotonicNanos() - 1'000'000'000);
      trainer.Send(m);
      trainer.WaitFor([](const e2e::TrainerStream::State& st) { return !st.acks.empty(); },
                      Clock::now() + std::chrono::seconds(5));
    }
    const auto period = std::chrono::nanoseconds(1'000'000'000 / config_.feedback_per_second);
    auto next = Clock::now();
    for (int i = 2; i <= total + 1; ++i) {
      std::this_thread::sleep_until(next);
      next += period;
      v1::TrainerMessage m = e2e::Feedback(static_cast<uint64_t>(i), i % 3 ? 1.0 : -1.0, "key:g");
      m.mutable_feedback()->set_event_source_ns(MonotonicNanos() - 1'000'000'000);
      send_ns[static_cast<size_t>(i)].store(MonotonicNanos());
      if (!trainer.Send(m)) break;
    }
    trainer.WaitFor(
        [total](const e2e::TrainerStream::State& st) {
          return st.acks.size() >= static_cast<size_t>(total + 1);
        },
        Clock::now() + std::chrono::seconds(20));
    // The subscriber ends with its last credit, or when cancelled here.
    const auto limit = Clock::now() + std::chrono::seconds(10);
    while (out.size() < static_cast<size_t>(total) && Clock::now() < limit) {
      std::this_thread::sleep_for(std::chrono::milliseconds(10));
    }
    ctx->TryCancel();
    sub.join();
    trainer.Finish();
    for (size_t i = 2; i < ack_ns.size(); ++i) {
      if (ack_ns[i].load() != 0) acks->push_back(ack_ns[i].load() - send_ns[i].load());
    }
    return out;
  }

 private:
  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<v1::SessionAdmin::Stub> admin_;
  std::unique_ptr<v1::Live::Stub> live_;
  std::string operator_token_;
  Config config_;
};

// A bare bidi echo on the callback API: what one round trip on a gRPC stream
// costs here, with nothing of tickmark in it.
class EchoService final : public grpc::CallbackGenericService {
 public:
  grpc::ServerGenericBidiReactor* CreateReactor(grpc::GenericCallbackServerContext*) override {
    class Reactor final : public grpc::ServerGenericBidiReactor {
     public:
      Reactor() { StartRead(&buffer_); }
      void OnReadDone(bool ok) override {
        if (!ok) return Finish(grpc::Status::OK);
        StartWrite(&buffer_);
      }
      void OnWriteDone(bool ok) override {
        if (!ok) return Finish(grpc::Status::CANCELLED);
        StartRead(&buffer_);
      }
      void OnDone() override { delete this; }

     private:
      grpc::ByteBuffer buffer_;  // the message being echoed
    };
    return new Reactor;
  }
};

// Round trips of the serialised feedback message for `seconds`.
std::vector<int64_t> PingPong(double seconds) {
  std::vector<int64_t> out;
  EchoService echo;
  int port = 0;
  std::unique_ptr<grpc::Server> server = StartBareServer(&echo, &port);
  if (!server) return out;
  auto channel =
      grpc::CreateChannel("127.0.0.1:" + std::to_string(port), grpc::InsecureChannelCredentials());
  grpc::GenericStub stub(channel);
  grpc::CompletionQueue cq;
  grpc::ClientContext ctx;
  auto call = stub.PrepareCall(&ctx, "/tickmark.bench.Echo/PingPong", &cq);
  void* tag = nullptr;
  bool ok = false;
  auto wait = [&](void* want) { return cq.Next(&tag, &ok) && tag == want && ok; };
  call->StartCall(reinterpret_cast<void*>(1));
  if (!wait(reinterpret_cast<void*>(1))) return out;
  v1::TrainerMessage m = e2e::Feedback(1, 1.0, "key:g");
  const std::string bytes = m.SerializeAsString();
  grpc::Slice slice(bytes);
  const grpc::ByteBuffer request(&slice, 1);
  grpc::ByteBuffer reply;
  const auto end = Clock::now() + std::chrono::duration_cast<Clock::duration>(
                                      std::chrono::duration<double>(seconds));
  while (Clock::now() < end) {
    const int64_t t0 = MonotonicNanos();
    call->Write(request, reinterpret_cast<void*>(2));
    if (!wait(reinterpret_cast<void*>(2))) break;
    call->Read(&reply, reinterpret_cast<void*>(3));
    if (!wait(reinterpret_cast<void*>(3))) break;
    out.push_back(MonotonicNanos() - t0);
  }
  call->WritesDone(reinterpret_cast<void*>(4));
  wait(reinterpret_cast<void*>(4));
  grpc::Status status;
  call->Finish(&status, reinterpret_cast<void*>(5));
  wait(reinterpret_cast<void*>(5));
  server->Shutdown(std::chrono::system_clock::now() + std::chrono::seconds(1));
  cq.Shutdown();
  while (cq.Next(&tag, &ok)) {
  }
  return out;
}

void PrintRow(const char* what, const Stats& s) {
  std::printf("  %-44s n=%7zu  p50 %9.1f µs  p99 %9.1f µs  max %9.1f µs\n", what, s.n, s.p50_us,
              s.p99_us, s.max_us);
}

// An in-process tickmarkd for the bench. With defer_wal_restart the SQLite
// ledger's writer never restarts the WAL nor checkpoints inline during a
// bench (the WAL grows to a few hundred MiB): the commit path without its one
// stall.
std::unique_ptr<BenchServer> StartServer(const Config& config, bool defer_wal_restart) {
  rpc::ServerOptions options = BenchServer::WithoutRateLimits();  // fan-out, not the limits
  options.live.subscriber_buffer = config.buffer;
  if (defer_wal_restart) {
    options.wal_restart_pages = 1 << 30;
    options.wal_backstop_pages = 1 << 30;
  }
  return BenchServer::Start("fanout_bench", options);
}

int Main(int argc, char** argv) {
  Config config;
  bool smoke = false;
  for (int i = 1; i < argc; ++i) {
    if (std::strncmp(argv[i], "--seconds=", 10) == 0) {
      config.seconds = std::atof(argv[i] + 10);
    } else if (std::strncmp(argv[i], "--buffer=", 9) == 0) {
      config.buffer = static_cast<size_t>(std::atol(argv[i] + 9));
    } else if (std::strncmp(argv[i], "--feedback-rate=", 16) == 0) {
      config.feedback_per_second = std::clamp(std::atoi(argv[i] + 16), 1, 5000);
    } else if (std::strcmp(argv[i], "--credit-only") == 0) {
      config.credit_only = true;
    } else if (std::strcmp(argv[i], "--per-record") == 0) {
      config.per_record = true;
    } else if (std::strcmp(argv[i], "--smoke") == 0) {
      smoke = true;  // what ./run test runs: every phase, briefly; figures mean nothing
    } else {
      std::printf(
          "fanout_bench [--seconds=S] [--buffer=N] [--feedback-rate=R] [--per-record]\n"
          "             [--credit-only] [--smoke]\n"
          "  Step fan-out to 64 subscribers (one stalled or none) and feedback -> first\n"
          "  CreditUpdate at R feedback/s (default 1000) against a bare gRPC ping-pong in the\n"
          "  same run. The credit subscriber uses SubscribeBatches, as the libraries do;\n"
          "  --per-record makes it use Subscribe (one record a message) instead;\n"
          "  --credit-only skips the step fan-out (to profile the credit path alone).\n"
          "  Prints targets and met / NOT met; asserts nothing.\n");
      return std::strcmp(argv[i], "--help") == 0 ? 0 : 2;
    }
  }
  config.seconds = std::clamp(config.seconds, 1.0, 10.0);
  if (smoke) {
    config.subscribers = 8;
    config.steps_per_second = 100;
    config.feedback_per_second = 100;
  }
  tickmark::SetLogLevel(tickmark::LogLevel::kWarning);
  auto main_server = StartServer(config, /*defer_wal_restart=*/false);
  if (!main_server) return 1;
  Bench bench(main_server->channel(), main_server->operator_token(), config);

  std::printf(
      "fanout_bench: in-process tickmarkd on loopback, %d subscribers, %d steps/s of %zu "
      "state bytes, %.1f s per phase, per-subscriber buffer %zu records\n\n",
      config.subscribers, config.steps_per_second, config.state_bytes, config.seconds,
      config.buffer);
  // A, B, A, B: slow drifts of the shared machine fall on both alike.
  std::vector<int64_t> none_ns, stalled_ns;
  for (int round = 0; round < (config.credit_only ? 0 : 2); ++round) {
    for (bool stall : {false, true}) {
      std::vector<int64_t> v = bench.StepDelivery(stall);
      auto& into = stall ? stalled_ns : none_ns;
      into.insert(into.end(), v.begin(), v.end());
    }
  }
  if (!config.credit_only) {
    const Stats none = Summarise(none_ns);
    const Stats stalled = Summarise(stalled_ns);
    std::printf("step delivery latency, subscribers 1..%d (agent send -> subscriber receipt):\n",
                config.subscribers - 1);
    PrintRow("A: no subscriber stalled", none);
    PrintRow("B: subscriber 0 stalled (never reads)", stalled);
    const double fan_ratio = none.p99_us > 0 ? stalled.p99_us / none.p99_us : 0;
    std::printf("  p99 B / A = %.2f   target <= 1.5: %s\n\n", fan_ratio,
                fan_ratio <= 1.5 ? "met" : "NOT met");
  }

  std::vector<int64_t> acks;
  const Stats credit = Summarise(bench.CreditLatency(&acks));
  const Stats ack = Summarise(acks);
  main_server.reset();
  // The same phase on a server whose writer never restarts the WAL: what the
  // path costs without its one stall (a bench setting, not a server flag).
  Stats floor_credit, floor_ack;
  if (auto floor_server = StartServer(config, /*defer_wal_restart=*/true)) {
    Bench floor_bench(floor_server->channel(), floor_server->operator_token(), config);
    std::vector<int64_t> floor_acks;
    floor_credit = Summarise(floor_bench.CreditLatency(&floor_acks));
    floor_ack = Summarise(floor_acks);
  }
  const Stats ping = Summarise(PingPong(config.seconds));
  std::printf(
      "trainer -> subscriber credit update at %d feedback/s (%s) vs bare gRPC bidi "
      "ping-pong (same run):\n",
      config.feedback_per_second,
      config.per_record ? "Subscribe, one record a message" : "SubscribeBatches");
  PrintRow("feedback send -> first CreditUpdate received", credit);
  PrintRow("  (its ack to the trainer: one ledger commit)", ack);
  PrintRow("the same, WAL restart deferred (no stall)", floor_credit);
  PrintRow("  (its ack)", floor_ack);
  PrintRow("bare bidi ping-pong round trip", ping);
  auto ratio = [&ping](const Stats& s) { return ping.p99_us > 0 ? s.p99_us / ping.p99_us : 0; };
  const double credit_ratio = ratio(credit);
  std::printf("  p99 credit / ping-pong = %.2f   target <= 5: %s\n", credit_ratio,
              credit_ratio <= 5 ? "met" : "NOT met");
  // Where the time goes (DEVELOPERS.md, Performance): the ack is one ledger
  // commit after the strand; the credit update adds the engine, a second
  // commit (derived records are durable before anyone sees them) and the
  // subscriber's strand and write. The deferred row is the floor: what is
  // left when the writer never stalls.
  if (floor_credit.n > 0) {
    std::printf(
        "  without the WAL restart's stall: p99 credit / ping-pong = %.2f, p99 ack (one\n"
        "  commit, no credit) / ping-pong = %.2f\n",
        ratio(floor_credit), ratio(floor_ack));
  } else {
    std::printf("  the phase with the WAL restart deferred measured nothing (see stderr)\n");
  }
  std::printf(
      "  breakdown at p50: ack (read, strand, commit, ack write) %.0f µs; credit after "
      "ack (engine, 2nd commit, fan-out) %.0f µs; ping-pong %.0f µs\n",
      ack.p50_us, credit.p50_us - ack.p50_us, ping.p50_us);
  // A profile summary (perf record over this bench, 2 cores shared with
  // other builds, load ~25; DEVELOPERS.md, Performance): re-take it when the
  // paths change.
  std::printf(
      "  profile (perf --credit-only, December 2026): each feedback yields ~30 credit\n"
      "  updates here (50 closed steps in the kernel's reach), ~30k records/s at 1k\n"
      "  feedback/s. With one record per message (--per-record) the server and the\n"
      "  subscriber spent the cores on thread wake-ups (~55%% kernel: futex and loopback TCP)\n"
      "  and the first credit update waited seconds; SubscribeBatches sends a burst as one\n"
      "  message. The ledger writer then spends about half its time in SQLite inserts (the\n"
      "  journal and the typed credit table), then CanonicalBody and the SHA-256 chain. The\n"
      "  p99 was a 15-20 ms stall of every append each time SQLite's automatic checkpoint\n"
      "  ran on the writer (every 1000 WAL pages, ~70 ms at this rate); checkpoints now run\n"
      "  on their own thread. The writer's one stall left is the finish before the WAL\n"
      "  starts again (the last frames copied and two syncs, 20-35 ms here), once per\n"
      "  64 MiB of WAL: about once a second at this rate, so it still sets the p99; it is\n"
      "  SQLite's (a WAL restarts only when every frame is copied and synced). The\n"
      "  deferred row above shows the path without it: the ack alone, one commit with no\n"
      "  credit in it, has a p99 well over 5x ping-pong (December 2026: 1.9 ms, 14x), and a\n"
      "  credit update needs two commits in sequence (the feedback is durable before its\n"
      "  credit is computed; the credit before anyone sees it) on two cores shared by\n"
      "  client, server, subscriber and checkpointer: the target is out of reach here.\n");

  return 0;
}

}  // namespace
}  // namespace tickmark::bench

int main(int argc, char** argv) { return tickmark::bench::Main(argc, argv); }

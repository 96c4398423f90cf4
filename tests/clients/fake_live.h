// A fake tickmark.v1.Live service for client tests: it follows the contract
// in stream.proto (Hello → Welcome, an Ack per message, deduplication by
// (client_id, client_sequence), ProbeRequests answered by ProbeReplies) and
// can be told to misbehave: end streams mid-way, reject chosen sequences,
// refuse hellos, leave hellos unanswered. It counts everything it sees so tests can check exactly-once
// delivery. Runs on 127.0.0.1:0 with the sync gRPC server API.
//
// Thread-safe: handlers run on gRPC threads, tests read and change the script
// from the test thread; one mutex guards all state.
#ifndef TICKMARK_TESTS_CLIENTS_FAKE_LIVE_H_
#define TICKMARK_TESTS_CLIENTS_FAKE_LIVE_H_

#include <chrono>
#include <condition_variable>
#include <cstdint>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <optional>
#include <set>
#include <string>
#include <type_traits>
#include <utility>
#include <vector>

#include "grpcpp/grpcpp.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::testing {

class FakeLive : public tickmark::v1::Live::Service {
 public:
  // How the fake misbehaves; change under Edit().
  struct Script {
    // Refuse every Hello with this status (a permanent error).
    std::optional<grpc::Status> hello_error;
    // Refuse this many Hellos with UNAVAILABLE first.
    int transient_hello_failures = 0;
    // Hellos (numbered from 1 over the fake's life) that get no answer at
    // all: the stream stays open, silent, until the client ends it.
    std::set<int> silent_hellos;
    // End a stream with UNAVAILABLE after it received this many messages
    // (0: never), at most max_drops times in all. When store_before_drop,
    // the last message is stored but its Ack never sent.
    int drop_after = 0;
    int max_drops = 0;
    bool store_before_drop = true;
    // Sequences answered with an INVALID_ARGUMENT Ack.
    std::set<uint64_t> reject;
    // Sequences answered with an UNAVAILABLE Ack (not stored: a server whose
    // disk is full), each only the first time it arrives.
    std::set<uint64_t> unavailable_once;
    // ProbeRequests sent right after each Welcome.
    int probes_per_stream = 0;
    // Added to Welcome.last_client_sequence: pretends another program with
    // the same client id stored more.
    uint64_t welcome_extra = 0;
    int64_t probe_t1_session_ns = 1'700'000'000'000'000'000;
    // Sent before the Ack of every stored CalibrationFinish (a server's
    // fitted Calibration); its run is set to the finish's run.
    tickmark::v1::Calibration calibration;
  };

  struct ProbeSeen {
    tickmark::v1::ProbeReply reply;
    int64_t hello_sent_client_ns = 0;  // of the stream it came on
  };

  FakeLive() = default;
  ~FakeLive() override { Stop(); }

  // Starts the server; returns "127.0.0.1:PORT".
  std::string Start() {
    grpc::ServerBuilder builder;
    int port = 0;
    builder.AddListeningPort("127.0.0.1:0", grpc::InsecureServerCredentials(),
                             &port);
    builder.RegisterService(this);
    server_ = builder.BuildAndStart();
    return "127.0.0.1:" + std::to_string(port);
  }
  void Stop() {
    if (server_) {
      server_->Shutdown(std::chrono::system_clock::now() +
                        std::chrono::seconds(1));
      server_.reset();
    }
  }

  void Edit(const std::function<void(Script&)>& f) {
    std::lock_guard<std::mutex> lock(mu_);
    f(script_);
  }

  // Waits until pred() (called under the lock) holds or the deadline passes.
  bool WaitFor(const std::function<bool()>& pred,
               std::chrono::seconds timeout = std::chrono::seconds(30)) {
    std::unique_lock<std::mutex> lock(mu_);
    return cv_.wait_for(lock, timeout, pred);
  }

  // Counters; read them under Locked() or after the clients are closed.
  int hellos() { std::lock_guard<std::mutex> l(mu_); return hellos_; }
  int drops() { std::lock_guard<std::mutex> l(mu_); return drops_; }
  int half_closes() { std::lock_guard<std::mutex> l(mu_); return half_closes_; }
  // (client_id, sequence) → times stored (must be 1) / times received.
  std::map<std::pair<std::string, uint64_t>, int> stored() {
    std::lock_guard<std::mutex> l(mu_); return stored_;
  }
  std::map<std::pair<std::string, uint64_t>, int> received() {
    std::lock_guard<std::mutex> l(mu_); return received_;
  }
  // (client_id, sequence) → the stored message body, serialized.
  std::map<std::pair<std::string, uint64_t>, std::string> bodies() {
    std::lock_guard<std::mutex> l(mu_); return bodies_;
  }
  // Sequences in the order they were stored.
  std::vector<uint64_t> store_order() {
    std::lock_guard<std::mutex> l(mu_); return store_order_;
  }
  std::vector<ProbeSeen> probes() {
    std::lock_guard<std::mutex> l(mu_); return probes_;
  }
  // Unlocked views for WaitFor predicates (which run under the lock).
  const std::vector<ProbeSeen>& probes_locked() const { return probes_; }
  int hellos_locked() const { return hellos_; }
  int half_closes_locked() const { return half_closes_; }

  grpc::Status Train(grpc::ServerContext* ctx,
                     grpc::ServerReaderWriter<tickmark::v1::ServerMessage,
                                              tickmark::v1::TrainerMessage>*
                         stream) override {
    return Serve(
        ctx, stream,
        [](const tickmark::v1::TrainerMessage& m) -> std::optional<uint64_t> {
          if (m.has_feedback()) return m.feedback().client_sequence();
          if (m.has_calibration()) return m.calibration().client_sequence();
          return std::nullopt;
        },
        std::function<std::optional<tickmark::v1::ServerMessage>(
            const tickmark::v1::TrainerMessage&)>(
            [this](const tickmark::v1::TrainerMessage& m)
                -> std::optional<tickmark::v1::ServerMessage> {
          if (!m.has_calibration() || !m.calibration().has_finish()) return std::nullopt;
          tickmark::v1::ServerMessage out;
          *out.mutable_calibration() = script_.calibration;  // under mu_
          out.mutable_calibration()->set_run(m.calibration().run());
          return out;
        }));
  }

  grpc::Status Act(grpc::ServerContext* ctx,
                   grpc::ServerReaderWriter<tickmark::v1::ServerMessage,
                                            tickmark::v1::AgentMessage>* stream)
      override {
    return Serve(ctx, stream, [](const tickmark::v1::AgentMessage& m)
                     -> std::optional<uint64_t> {
      if (m.has_step()) return m.step().client_sequence();
      return std::nullopt;
    });
  }

 private:
  // before_ack(message), called under mu_ for a stored message: a server
  // message to write before its Ack, if any.
  template <typename In, typename SeqOf>
  grpc::Status Serve(
      grpc::ServerContext*,
      grpc::ServerReaderWriter<tickmark::v1::ServerMessage, In>* stream, SeqOf seq_of,
      std::type_identity_t<std::function<std::optional<tickmark::v1::ServerMessage>(const In&)>>
          before_ack = {}) {
    In in;
    if (!stream->Read(&in) || !in.has_hello()) {
      return grpc::Status(grpc::StatusCode::INVALID_ARGUMENT, "hello first");
    }
    const std::string client_id = in.hello().client_id();
    const int64_t hello_ns = in.hello().sent_client_ns();
    tickmark::v1::ServerMessage out;
    int probes = 0;
    bool silent = false;
    {
      std::lock_guard<std::mutex> lock(mu_);
      ++hellos_;
      cv_.notify_all();
      silent = script_.silent_hellos.count(hellos_) != 0;
    }
    if (silent) {
      while (stream->Read(&in)) {
      }
      return grpc::Status::OK;
    }
    {
      std::lock_guard<std::mutex> lock(mu_);
      if (script_.hello_error) return *script_.hello_error;
      if (script_.transient_hello_failures > 0) {
        --script_.transient_hello_failures;
        return grpc::Status(grpc::StatusCode::UNAVAILABLE, "not yet");
      }
      auto* w = out.mutable_welcome();
      w->set_session_id("s-fake");
      w->set_subject("trainer-fake");
      w->set_role(tickmark::v1::ROLE_TRAINER);
      w->set_last_client_sequence(last_sequence_[client_id] + script_.welcome_extra);
      probes = script_.probes_per_stream;
    }
    if (!stream->Write(out)) return grpc::Status::OK;
    for (int i = 0; i < probes; ++i) {
      tickmark::v1::ServerMessage p;
      p.mutable_probe()->set_probe_id(static_cast<uint64_t>(i + 1));
      std::lock_guard<std::mutex> lock(mu_);
      p.mutable_probe()->set_t1_session_ns(script_.probe_t1_session_ns + i);
      if (!stream->Write(p)) return grpc::Status::OK;
    }
    int count = 0;
    while (stream->Read(&in)) {
      std::unique_lock<std::mutex> lock(mu_);
      if (in.has_probe_reply()) {
        probes_.push_back({in.probe_reply(), hello_ns});
        cv_.notify_all();
        continue;
      }
      std::optional<uint64_t> seq = seq_of(in);
      if (!seq) continue;
      const auto key = std::make_pair(client_id, *seq);
      ++received_[key];
      ++count;
      const int drop_after = drops_ < script_.max_drops ? script_.drop_after : 0;
      const bool drop = drop_after > 0 && count >= drop_after;
      const bool store_before_drop = script_.store_before_drop;
      tickmark::v1::ServerMessage ack;
      std::optional<tickmark::v1::ServerMessage> before;
      auto* a = ack.mutable_ack();
      a->set_client_sequence(*seq);
      if (script_.reject.count(*seq) != 0) {
        a->set_code(static_cast<int32_t>(grpc::StatusCode::INVALID_ARGUMENT));
        a->set_message("rejected by script");
      } else if (script_.unavailable_once.erase(*seq) != 0) {
        a->set_code(static_cast<int32_t>(grpc::StatusCode::UNAVAILABLE));
        a->set_message("ledger disk full (not stored; send it again later)");
      } else if (!drop || store_before_drop) {
        if (stored_.count(key) != 0) {
          a->set_duplicate(true);
        } else {
          stored_[key] = 1;
          bodies_[key] = in.SerializeAsString();
          store_order_.push_back(*seq);
          last_sequence_[client_id] = std::max(last_sequence_[client_id], *seq);
        }
        if (before_ack) before = before_ack(in);
        a->set_sequence(*seq);
        a->set_event_session_ns(1'700'000'000'000'000'000 + static_cast<int64_t>(*seq));
        a->set_uncertainty_ns(500'000);
      }
      if (drop) {
        ++drops_;
        cv_.notify_all();
        return grpc::Status(grpc::StatusCode::UNAVAILABLE, "dropped by script");
      }
      cv_.notify_all();
      lock.unlock();
      if (before && !stream->Write(*before)) return grpc::Status::OK;
      if (!stream->Write(ack)) return grpc::Status::OK;
    }
    std::lock_guard<std::mutex> lock(mu_);
    ++half_closes_;
    cv_.notify_all();
    return grpc::Status::OK;
  }

  std::unique_ptr<grpc::Server> server_;
  std::mutex mu_;
  std::condition_variable cv_;
  Script script_;                                        // guarded by mu_
  int hellos_ = 0;                                       // guarded by mu_
  int drops_ = 0;                                        // guarded by mu_
  int half_closes_ = 0;                                  // guarded by mu_
  std::map<std::pair<std::string, uint64_t>, int> stored_;    // mu_
  std::map<std::pair<std::string, uint64_t>, int> received_;  // mu_
  std::map<std::string, uint64_t> last_sequence_;             // mu_
  std::map<std::pair<std::string, uint64_t>, std::string> bodies_;  // mu_
  std::vector<uint64_t> store_order_;                          // mu_
  std::vector<ProbeSeen> probes_;                              // mu_
};

}  // namespace tickmark::testing

#endif  // TICKMARK_TESTS_CLIENTS_FAKE_LIVE_H_

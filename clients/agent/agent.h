// tickmark::agent — connect a C++ learner to a tickmark session.
//
//   #include "clients/agent/agent.h"
//
//   tickmark::agent::Agent::Options options;
//   options.server = "127.0.0.1:7461";
//   options.token_file = "agent.token";           // or $TICKMARK_TOKEN
//   auto agent = tickmark::agent::Agent::Connect(options);
//   if (!agent.ok()) { /* agent.status() says why */ }
//
//   tickmark::agent::Step step;
//   step.action = "north";
//   step.state = "3,4";                             // opaque bytes
//   step.features = {3, 4};
//   (*agent)->Publish(step);                        // timed now on the agent's clock
//
//   // Settled labels, from the start (or from a sequence you persisted).
//   auto labels = (*agent)->Subscribe({.from_sequence = 1,
//                                      .kinds = {tickmark::v1::RECORD_KIND_LABEL}});
//   while (auto record = labels->Next(std::chrono::seconds(1))) {
//     const tickmark::v1::Label& label = record->label();
//     // ... learn from label.value() / label.weight(); persist record->sequence()
//   }
//
// What the library does for you: answers the server's clock probes from the
// same clock that times the steps (default CLOCK_MONOTONIC; inject another
// with Options::clock), keeps every step until the server acknowledges it and
// resends after a reconnect (the server stores each once), and resumes
// subscriptions after a broken connection right after the last record
// delivered, so every record arrives exactly once and in order. When the
// host's clock is disciplined (NTP/PTP; the kernel says synchronised), each
// step also carries its CLOCK_REALTIME reading and the kernel's bound, so
// the server may map it through real time (Options::send_realtime).
//
// Thread safety: Agent::Publish/Flush and Subscription::Next may be called
// from any thread; one thread at a time should call Next on a Subscription.
#ifndef TICKMARK_CLIENTS_AGENT_AGENT_H_
#define TICKMARK_CLIENTS_AGENT_AGENT_H_

#include <chrono>
#include <condition_variable>
#include <deque>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "clients/common/stream_client.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::agent {

// One decision of the agent.
struct Step {
  std::string action;
  std::string state;            // opaque payload (bytes), at most the server's limit
  std::vector<float> features;  // optional
  uint64_t episode = 0;
  uint64_t step_id = 0;         // 0: the next number (1, 2, 3, ...)
  int64_t start_ns = 0;         // 0: now on the agent's clock
  int64_t end_ns = 0;           // 0: ends when the next step starts
};

struct SubscribeOptions {
  uint64_t from_sequence = 1;                    // persisted position + 1 to resume
  std::vector<tickmark::v1::RecordKind> kinds;  // empty: every kind
  bool follow = true;                            // false: stop at the current end
};

// Records of a session in sequence order, reconnecting as needed. Owns a
// reader thread; destroy it (or call Close) to stop.
class Subscription {
 public:
  ~Subscription();
  // The next record, or nullopt after `timeout` or at the end (see done()).
  std::optional<tickmark::v1::Record> Next(std::chrono::milliseconds timeout);
  // True once nothing more will come (follow=false reached the end, the
  // session closed, or a permanent error; see status()).
  bool done() const;
  absl::Status status() const;
  // Sequence of the last record returned by Next (persist it to resume).
  uint64_t position() const;
  void Close();

 private:
  friend class Agent;
  Subscription(std::shared_ptr<grpc::Channel> channel, std::string token, std::string session_id,
               SubscribeOptions options);
  void Run();

  std::shared_ptr<grpc::Channel> channel_;
  const std::string token_;
  const std::string session_id_;
  const SubscribeOptions options_;

  mutable std::mutex mu_;
  std::condition_variable cv_;                // records arrived, or done
  std::deque<tickmark::v1::Record> queue_;    // GUARDED_BY(mu_)
  uint64_t received_ = 0;                     // last sequence read from the server
  uint64_t position_ = 0;                     // last sequence returned by Next
  bool done_ = false;
  bool closing_ = false;
  absl::Status status_;
  grpc::ClientContext* current_ = nullptr;    // the running call, for Close
  std::thread reader_;
};

class Agent {
 public:
  struct Options {
    std::string server = "127.0.0.1:7461";
    std::string token;        // the secret; or
    std::string token_file;   // a file holding it; else $TICKMARK_TOKEN
    std::string client_id;    // stable id; default: <installation id>:agent:cpp
    std::string description = "C++ agent";
    std::string ca_file;      // TLS roots; plaintext on loopback otherwise
    bool insecure = false;    // plaintext to a non-loopback server
    const MonotonicSource* clock = nullptr;  // default CLOCK_MONOTONIC; not owned
    std::chrono::milliseconds connect_timeout{10000};
    // One attempt without a Welcome is given up after this and retried
    // (client::StreamOptions::hello_timeout); zero waits without limit.
    std::chrono::milliseconds hello_timeout{10000};
    // Disciplined clocks (docs/time-model.md): send each step's
    // CLOCK_REALTIME reading and the kernel's bound when the kernel says the
    // clock is synchronised (client::StreamOptions::send_realtime).
    bool send_realtime = true;
    // Where that state is read; null: the running kernel. Not owned.
    const ClockDiscipline* discipline = nullptr;
  };

  // Connects and waits up to connect_timeout for the server's welcome,
  // retrying attempts that get none within hello_timeout. UNAUTHENTICATED
  // etc. when the server refuses; DEADLINE_EXCEEDED when it does not answer.
  static absl::StatusOr<std::unique_ptr<Agent>> Connect(const Options& options);
  ~Agent();

  // Queues a step; returns its step id. Sent in order, resent after
  // reconnects until acknowledged.
  absl::StatusOr<uint64_t> Publish(Step step);
  // Waits until every published step is stored.
  absl::Status Flush(std::chrono::milliseconds timeout);
  std::unique_ptr<Subscription> Subscribe(SubscribeOptions options);

  const std::string& session_id() const { return session_id_; }
  const std::string& name() const { return name_; }
  client::StreamStatus status() const { return stream_.status(); }
  int64_t NowNanos() const;
  // Flushes (up to `timeout`) and disconnects.
  absl::Status Close(std::chrono::milliseconds timeout);

 private:
  Agent() = default;

  client::AgentClient stream_;
  std::shared_ptr<grpc::Channel> channel_;  // for subscriptions
  std::string token_;
  std::string session_id_;
  std::string name_;
  const MonotonicSource* clock_ = nullptr;
  SystemMonotonic system_clock_;
  std::mutex mu_;
  uint64_t next_step_id_ = 1;  // GUARDED_BY(mu_)
};

}  // namespace tickmark::agent

#endif  // TICKMARK_CLIENTS_AGENT_AGENT_H_

// A raw Live stream (stream.proto) for end-to-end tests and the ingest
// bench: the generated gRPC stub with nothing of clients/common in between,
// so what is checked is the server's wire behaviour, not a client library's.
//
// One reader thread takes the server's messages: it answers every
// ProbeRequest at once (T2 stamped right after the read, T3 right before the
// write, both on CLOCK_MONOTONIC, the clock event times are stamped with),
// keeps the Welcome and every Ack, and calls on_ack for each Ack. Writes from
// the caller and from the reader are serialised by one mutex, as the sync
// gRPC API requires.
//
// Also: small helpers for SessionAdmin calls with a bearer token.
//
// Thread safety: Send, WaitFor, Snapshot and Cancel may be called from any
// thread; Hello and Finish from the owning thread only. on_ack runs on the
// reader thread and must not call Finish.
#ifndef TICKMARK_TESTS_E2E_LIVE_STREAM_H_
#define TICKMARK_TESTS_E2E_LIVE_STREAM_H_

#include <time.h>

#include <chrono>
#include <condition_variable>
#include <cstdint>
#include <functional>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include "grpcpp/grpcpp.h"
#include "tickmark/v1/admin.grpc.pb.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::e2e {

namespace v1 = tickmark::v1;
using Clock = std::chrono::steady_clock;

// CLOCK_MONOTONIC in nanoseconds: the client clock of these streams.
inline int64_t MonotonicNanos() {
  timespec ts{};
  clock_gettime(CLOCK_MONOTONIC, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 + ts.tv_nsec;
}

inline std::unique_ptr<grpc::ClientReaderWriter<v1::TrainerMessage, v1::ServerMessage>> OpenCall(
    v1::Live::Stub* stub, grpc::ClientContext* ctx, const v1::TrainerMessage*) {
  return stub->Train(ctx);
}
inline std::unique_ptr<grpc::ClientReaderWriter<v1::AgentMessage, v1::ServerMessage>> OpenCall(
    v1::Live::Stub* stub, grpc::ClientContext* ctx, const v1::AgentMessage*) {
  return stub->Act(ctx);
}

// Request is v1::TrainerMessage (rpc Train) or v1::AgentMessage (rpc Act).
template <typename Request>
class LiveStream {
 public:
  using AckFn = std::function<void(const v1::Ack&)>;

  // What the reader has seen so far.
  struct State {
    std::optional<v1::Welcome> welcome;
    std::vector<v1::Ack> acks;  // in arrival order
    uint64_t probes_answered = 0;
    bool ended = false;         // Read() returned false: the call is over
  };

  // `call_deadline` bounds the whole call, so Finish can never hang.
  explicit LiveStream(std::shared_ptr<grpc::Channel> channel, AckFn on_ack = {},
                      std::chrono::seconds call_deadline = std::chrono::seconds(60))
      : stub_(v1::Live::NewStub(std::move(channel))), on_ack_(std::move(on_ack)) {
    ctx_.set_deadline(std::chrono::system_clock::now() + call_deadline);
  }
  ~LiveStream() {
    if (stream_ && !finished_) {
      ctx_.TryCancel();
      Finish();
    }
  }
  LiveStream(const LiveStream&) = delete;
  LiveStream& operator=(const LiveStream&) = delete;

  // Asks the server to coalesce acks (ServerMessage.ack_batch, stream.proto);
  // call before Hello. Either way every Ack reaches on_ack and State::acks.
  void RequestAckBatches() { ctx_.AddMetadata("tickmark-ack-batch", "1"); }

  // Opens the call, sends the Hello and waits for the Welcome. nullopt when
  // the call ended first (see Finish for its status) or the deadline passed.
  std::optional<v1::Welcome> Hello(const std::string& token, const std::string& client_id,
                                   Clock::time_point deadline) {
    stream_ = OpenCall(stub_.get(), &ctx_, static_cast<const Request*>(nullptr));
    reader_ = std::thread([this] { ReadLoop(); });
    Request hello;
    v1::Hello* h = hello.mutable_hello();
    h->set_token(token);
    h->set_client_id(client_id);
    h->set_source_kind(v1::SOURCE_KIND_SCRIPT);
    h->set_source_description("tickmark end-to-end test");
    h->set_software("tickmark-e2e 0.1.0");
    h->set_sent_client_ns(MonotonicNanos());
    if (!Send(hello)) return std::nullopt;
    std::unique_lock<std::mutex> lock(mu_);
    cv_.wait_until(lock, deadline, [this] { return state_.welcome || state_.ended; });
    return state_.welcome;
  }

  // False once the call is over.
  bool Send(const Request& m) {
    std::lock_guard<std::mutex> lock(write_mu_);
    if (writes_done_) return false;
    return stream_->Write(m);
  }

  // Waits until pred(state) holds (checked under the lock) or the deadline.
  bool WaitFor(const std::function<bool(const State&)>& pred, Clock::time_point deadline) {
    std::unique_lock<std::mutex> lock(mu_);
    return cv_.wait_until(lock, deadline, [&] { return pred(state_); });
  }

  State Snapshot() {
    std::lock_guard<std::mutex> lock(mu_);
    return state_;
  }

  void Cancel() { ctx_.TryCancel(); }

  // Half-closes (the server then ends the call once every ack is out), waits
  // for the reader and returns the call's status.
  grpc::Status Finish() {
    if (finished_) return status_;
    finished_ = true;
    {
      std::lock_guard<std::mutex> lock(write_mu_);
      if (!writes_done_) {
        writes_done_ = true;
        stream_->WritesDone();
      }
    }
    if (reader_.joinable()) reader_.join();
    status_ = stream_->Finish();
    return status_;
  }

 private:
  void ReadLoop() {
    v1::ServerMessage m;
    while (stream_->Read(&m)) {
      const int64_t t2 = MonotonicNanos();
      if (m.has_probe()) {
        Request reply;
        v1::ProbeReply* p = reply.mutable_probe_reply();
        p->set_probe_id(m.probe().probe_id());
        p->set_t1_session_ns(m.probe().t1_session_ns());
        p->set_t2_client_ns(t2);
        bool sent = false;
        {
          std::lock_guard<std::mutex> lock(write_mu_);
          if (!writes_done_) {
            p->set_t3_client_ns(MonotonicNanos());
            sent = stream_->Write(reply);
          }
        }
        if (sent) {
          std::lock_guard<std::mutex> lock(mu_);
          ++state_.probes_answered;
        }
      } else if (m.has_welcome()) {
        std::lock_guard<std::mutex> lock(mu_);
        state_.welcome = m.welcome();
        cv_.notify_all();
      } else if (m.has_ack()) {
        if (on_ack_) on_ack_(m.ack());
        std::lock_guard<std::mutex> lock(mu_);
        state_.acks.push_back(m.ack());
        cv_.notify_all();
      } else if (m.has_ack_batch()) {
        if (on_ack_) {
          for (const v1::Ack& a : m.ack_batch().acks()) on_ack_(a);
        }
        std::lock_guard<std::mutex> lock(mu_);
        for (const v1::Ack& a : m.ack_batch().acks()) state_.acks.push_back(a);
        cv_.notify_all();
      }
    }
    std::lock_guard<std::mutex> lock(mu_);
    state_.ended = true;
    cv_.notify_all();
  }

  std::unique_ptr<v1::Live::Stub> stub_;
  const AckFn on_ack_;
  grpc::ClientContext ctx_;
  std::unique_ptr<grpc::ClientReaderWriter<Request, v1::ServerMessage>> stream_;
  std::thread reader_;              // runs ReadLoop
  bool finished_ = false;           // owning thread only
  grpc::Status status_;             // owning thread only

  std::mutex write_mu_;             // serialises Write and WritesDone
  bool writes_done_ = false;        // GUARDED_BY(write_mu_)

  std::mutex mu_;
  std::condition_variable cv_;      // signalled on every change of state_
  State state_;                     // GUARDED_BY(mu_)
};

using TrainerStream = LiveStream<v1::TrainerMessage>;
using AgentStream = LiveStream<v1::AgentMessage>;

inline v1::TrainerMessage Feedback(uint64_t client_sequence, double value,
                                   const std::string& input = "script") {
  v1::TrainerMessage m;
  v1::FeedbackMessage* f = m.mutable_feedback();
  f->set_client_sequence(client_sequence);
  f->set_value(value);
  f->set_event_source_ns(MonotonicNanos());
  f->set_input(input);
  return m;
}

// A context carrying "authorization: Bearer <token>" and a deadline.
inline std::unique_ptr<grpc::ClientContext> AuthContext(const std::string& token,
                                                        std::chrono::seconds timeout =
                                                            std::chrono::seconds(10)) {
  auto ctx = std::make_unique<grpc::ClientContext>();
  ctx->AddMetadata("authorization", "Bearer " + token);
  ctx->set_deadline(std::chrono::system_clock::now() + timeout);
  return ctx;
}

// Creates a session and issues one token for it, with the operator token.
struct SessionWithToken {
  std::string session_id;
  std::string admin_secret;
  std::string token;  // the issued token's secret
};

inline grpc::Status CreateSessionWithToken(v1::SessionAdmin::Stub* admin,
                                           const std::string& operator_token,
                                           const std::string& title, v1::Role role,
                                           const std::string& subject, SessionWithToken* out) {
  v1::CreateSessionRequest create;
  create.set_title(title);
  v1::CreateSessionResponse created;
  grpc::Status s = admin->CreateSession(AuthContext(operator_token).get(), create, &created);
  if (!s.ok()) return s;
  out->session_id = created.session().id();
  out->admin_secret = created.admin_secret();
  v1::IssueTokenRequest issue;
  issue.set_session_id(out->session_id);
  issue.set_role(role);
  issue.set_subject(subject);
  v1::IssueTokenResponse issued;
  s = admin->IssueToken(AuthContext(operator_token).get(), issue, &issued);
  if (s.ok()) out->token = issued.secret();
  return s;
}

}  // namespace tickmark::e2e

#endif  // TICKMARK_TESTS_E2E_LIVE_STREAM_H_

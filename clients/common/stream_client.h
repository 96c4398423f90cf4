// StreamClient: one reconnecting live stream to tickmarkd (stream.proto,
// service tickmark.v1.Live) that delivers every message exactly once in
// effect: at-least-once transport, deduplicated by the server on
// (client_id, client_sequence) (docs/architecture.md §6).
//
// One class template serves both stream kinds: StreamClient<TrainerStream>
// (rpc Train, FeedbackMessage) and StreamClient<AgentStream> (rpc Act,
// StepMessage). Both are compiled once, in stream_client.cc.
//
// Other numbered bodies. Besides its payload a stream may carry other
// messages that share the client sequences and the resend queue: a trainer
// stream's CalibrationMessage (a calibration run, docs/calibration.md).
// SendRequest() queues a whole Request with such a body; its acks and
// rejections go to on_request_ack / on_request_rejected, and server messages
// other than Welcome, Ack and ProbeRequest (ServerMessage.calibration, sent
// just before the Ack of a CalibrationFinish) to on_server_message, on the
// reader thread, in the order they arrived.
//
// Life of a connection: Hello (token, client id, source, software, client
// clock) → Welcome → messages and Acks, with the server's ProbeRequests
// answered at once (T2 stamped right after the read, T3 right before the
// write, both on the injected client clock — the clock event times use).
// On stream loss the client waits (exponential backoff, 100 ms doubling to
// 5 s, ±20% jitter, reset after a Welcome), says Hello again and resends
// every unacknowledged message in sequence order. A server that takes the
// stream but sends no Welcome within StreamOptions::hello_timeout counts as
// a lost stream too (DEADLINE_EXCEEDED in last_error): the attempt is
// cancelled and the next one follows after the backoff. An Ack with code 0 (stored
// or duplicate) removes a message; an Ack with another code rejects it for
// good: it is removed, reported through on_rejected, never resent.
// UNAUTHENTICATED, PERMISSION_DENIED, NOT_FOUND, FAILED_PRECONDITION (at any
// time) and INVALID_ARGUMENT (before the Welcome) are permanent: the client
// stops, keeps its queue, and reports through status() and on_state.
//
// Client sequences. The server remembers the highest sequence it stored for a
// client id (Welcome.last_client_sequence). A program restarted with the same
// stable client id must continue above it, or its new messages would be
// taken for duplicates of old ones. So messages given to Send() before the
// first Welcome wait unnumbered and are numbered from last_client_sequence+1
// when it arrives; later ones are numbered at once. If a later Welcome reports
// a sequence above any this client assigned, another program is using the
// same client id: that is a permanent FAILED_PRECONDITION error.
//
// UDP probes. When the Welcome announces a UDP probe port (DEVELOPERS.md,
// "UDP probe port") and StreamOptions::udp_probes is on, the connection also
// starts clock probes itself over UDP to that port on the target's host: a
// burst, then one per udp_probe_interval, each signed with the stream's key.
// They feed the same clock model; a lost or blocked datagram costs nothing
// but the sample, since the stream's own probes go on regardless.
//
// Threads and ownership. Connect() starts one worker thread (connects, waits,
// writes) and each connection has one reader thread (Hello, acks, probes), plus
// one UDP prober thread when the server offers a probe port. The
// client owns both and joins them in Close() or the destructor.
// Send, Flush, status and Close are thread-safe and may be called from any
// thread. Callbacks run on the client's threads, without the client's lock
// held: they may call Send and status, but must not call Close or destroy the
// client (that would join the calling thread), and should return quickly
// (a slow callback delays probe answers).
#ifndef TICKMARK_CLIENTS_COMMON_STREAM_CLIENT_H_
#define TICKMARK_CLIENTS_COMMON_STREAM_CLIENT_H_

#include <chrono>
#include <condition_variable>
#include <cstddef>
#include <cstdint>
#include <deque>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include "absl/status/status.h"
#include "grpcpp/grpcpp.h"
#include "server/core/disciplined_clock.h"
#include "server/core/time.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::client {

// Trainer streams: rpc Train, payload FeedbackMessage.
struct TrainerStream {
  using Request = tickmark::v1::TrainerMessage;
  using Payload = tickmark::v1::FeedbackMessage;
  static std::unique_ptr<
      grpc::ClientReaderWriter<Request, tickmark::v1::ServerMessage>>
  Open(tickmark::v1::Live::Stub* stub, grpc::ClientContext* ctx) {
    return stub->Train(ctx);
  }
  static Payload* MutablePayload(Request* r) { return r->mutable_feedback(); }
  static const Payload& GetPayload(const Request& r) { return r.feedback(); }
  static bool HasPayload(const Request& r) { return r.has_feedback(); }
  // The event time and the real-time fields that go with it.
  static int64_t EventTime(const Payload& p) { return p.event_source_ns(); }
  static bool HasRealtime(const Payload& p) { return p.event_realtime_ns() != 0; }
  static void SetRealtime(Payload* p, int64_t realtime_ns, int64_t bound_ns) {
    p->set_event_realtime_ns(realtime_ns);
    p->set_realtime_bound_ns(bound_ns);
    p->set_realtime_synced(true);
  }
  // Numbers a body that carries a client sequence; false for others.
  static bool SetSequence(Request* r, uint64_t seq) {
    if (r->has_feedback()) {
      r->mutable_feedback()->set_client_sequence(seq);
    } else if (r->has_calibration()) {
      r->mutable_calibration()->set_client_sequence(seq);
    } else if (r->has_sync_pulse()) {
      r->mutable_sync_pulse()->set_client_sequence(seq);
    } else {
      return false;
    }
    return true;
  }
};

// Agent streams: rpc Act, payload StepMessage.
struct AgentStream {
  using Request = tickmark::v1::AgentMessage;
  using Payload = tickmark::v1::StepMessage;
  static std::unique_ptr<
      grpc::ClientReaderWriter<Request, tickmark::v1::ServerMessage>>
  Open(tickmark::v1::Live::Stub* stub, grpc::ClientContext* ctx) {
    return stub->Act(ctx);
  }
  static Payload* MutablePayload(Request* r) { return r->mutable_step(); }
  static const Payload& GetPayload(const Request& r) { return r.step(); }
  static bool HasPayload(const Request& r) { return r.has_step(); }
  static int64_t EventTime(const Payload& p) { return p.start_agent_ns(); }
  static bool HasRealtime(const Payload& p) { return p.start_realtime_ns() != 0; }
  static void SetRealtime(Payload* p, int64_t realtime_ns, int64_t bound_ns) {
    p->set_start_realtime_ns(realtime_ns);
    p->set_realtime_bound_ns(bound_ns);
    p->set_realtime_synced(true);
  }
  static bool SetSequence(Request* r, uint64_t seq) {
    if (!r->has_step()) return false;
    r->mutable_step()->set_client_sequence(seq);
    return true;
  }
};

// What the Hello says about the source and the program.
struct SourceInfo {
  tickmark::v1::SourceKind kind = tickmark::v1::SOURCE_KIND_UNSPECIFIED;
  std::string description;  // "keys on /dev/pts/3"
  std::string software;     // "tickmark-keys 0.1.0"
};

struct StreamOptions {
  std::string target;    // "host:port"
  std::string token;     // sent in the Hello; see token.h
  std::string client_id; // stable; see client_id.h
  SourceInfo source;
  std::shared_ptr<grpc::ChannelCredentials> credentials;  // see channel.h
  // Event times and probe answers are read from this clock. Not owned; must
  // outlive the client. nullptr: CLOCK_MONOTONIC (SystemMonotonic,
  // server/core/time.h).
  const MonotonicSource* clock = nullptr;
  // An attempt whose Welcome has not arrived this long after it started is
  // given up and retried (a server that accepts streams but never answers
  // must not hold the client forever). Zero: wait without limit.
  Duration hello_timeout = Duration::Seconds(10);
  Duration initial_backoff = Duration::Millis(100);
  Duration max_backoff = Duration::Seconds(5);
  double backoff_jitter = 0.2;  // ± fraction of each wait
  // Send() fails with RESOURCE_EXHAUSTED beyond this many waiting messages.
  size_t max_pending = 1'000'000;
  // HTTP/2 keepalive ping interval, to notice a silently dead path; zero
  // leaves it off (the server must permit pings this often, or it answers
  // with GOAWAY "too_many_pings").
  Duration keepalive = Duration::Zero();
  // Start UDP probes when the server offers a probe port (see above).
  bool udp_probes = true;
  Duration udp_probe_interval = Duration::Seconds(1);
  // Disciplined clocks (docs/time-model.md): when the host's kernel says its
  // clock is synchronised (NTP/PTP), Send() adds to each feedback or step
  // its CLOCK_REALTIME at the event time and the kernel's error bound
  // (ReadRealtimeAt, server/core/disciplined_clock.h), unless the payload
  // carries a reading already; the server may then map through real time.
  // false: never add them (client programs: --no-realtime).
  bool send_realtime = true;
  // Where the discipline state and CLOCK_REALTIME are read; null: the
  // running kernel (KernelDiscipline). Not owned; must outlive the client.
  const ClockDiscipline* discipline = nullptr;
};

// One acknowledgement, as the UI shows it.
struct AckInfo {
  uint64_t client_sequence = 0;
  uint64_t sequence = 0;  // session sequence of the stored record
  bool duplicate = false;
  int64_t event_session_ns = 0;  // where the event landed on session time
  int64_t uncertainty_ns = 0;    // half-width of that estimate
};

enum class StreamState {
  kIdle,        // Connect() not called yet
  kConnecting,  // Hello sent, waiting for the Welcome
  kConnected,   // Welcome received; sending and acknowledging
  kWaiting,     // stream lost; waiting out the backoff before reconnecting
  kClosed,      // Close() finished
  kFailed,      // permanent error; see last_error
};

const char* StreamStateName(StreamState s);

// A snapshot for a UI.
struct StreamStatus {
  StreamState state = StreamState::kIdle;
  bool connected() const { return state == StreamState::kConnected; }
  uint64_t sent = 0;      // messages accepted by Send()
  uint64_t acked = 0;     // acknowledged with code 0 (stored or duplicate)
  uint64_t rejected = 0;  // acknowledged with a non-zero code
  uint64_t pending = 0;   // accepted, not yet acknowledged
  uint64_t connections = 0;  // Welcomes received
  uint64_t reconnects = 0;   // connection attempts after the first
  uint64_t redirects = 0;    // times a server named another instance as the owner
  uint64_t probes_answered = 0;
  uint64_t udp_probes = 0;   // UDP probe exchanges completed (all connections)
  std::optional<AckInfo> last_ack;
  absl::Status last_error;  // latest stream error (OK if none yet)
  std::string session_id;   // from the latest Welcome
  std::string subject;      // trainer pseudonym or agent name (Welcome)
};

template <typename Kind>
class StreamClient {
 public:
  using Request = typename Kind::Request;
  using Payload = typename Kind::Payload;
  using Deadline = std::chrono::steady_clock::time_point;

  struct Callbacks {
    // A message was acknowledged with code 0; called once per message.
    std::function<void(const AckInfo&, const Payload&)> on_ack;
    // A message was rejected (Ack code != 0); it will not be resent.
    std::function<void(uint64_t client_sequence, const Payload&,
                       const absl::Status&)>
        on_rejected;
    // The state changed (connected, waiting, failed, closed).
    std::function<void(const StreamStatus&)> on_state;
    // Like on_ack and on_rejected, for messages given to SendRequest().
    std::function<void(const AckInfo&, const Request&)> on_request_ack;
    std::function<void(uint64_t client_sequence, const Request&,
                       const absl::Status&)>
        on_request_rejected;
    // A ServerMessage other than Welcome, Ack or ProbeRequest (e.g. the
    // fitted Calibration), in arrival order with the acks.
    std::function<void(const tickmark::v1::ServerMessage&)> on_server_message;
  };

  StreamClient();
  // Close()s with a short deadline, then cancels what is left.
  ~StreamClient();
  StreamClient(const StreamClient&) = delete;
  StreamClient& operator=(const StreamClient&) = delete;

  // Checks the options (INVALID_ARGUMENT for a bad client id, missing token
  // or credentials; FAILED_PRECONDITION if called twice) and starts the
  // worker thread, which connects in the background.
  absl::Status Connect(StreamOptions options, Callbacks callbacks = {});

  // Queues `payload` (its client_sequence is overwritten; its real-time
  // reading added, see StreamOptions::send_realtime) and writes it when
  // connected. FAILED_PRECONDITION after Close() or a permanent error;
  // RESOURCE_EXHAUSTED when max_pending messages are waiting.
  absl::Status Send(Payload payload);

  // Queues a whole message whose body carries a client sequence other than
  // the payload (a trainer stream's CalibrationMessage); numbered, resent
  // and acknowledged like payloads, reported through on_request_ack and
  // on_request_rejected. INVALID_ARGUMENT for a body without a sequence
  // (hello, probe reply, empty); otherwise as Send().
  absl::Status SendRequest(Request request);

  // Waits until every message given to Send() is acknowledged or rejected.
  // OK then; the permanent error if the client failed; DEADLINE_EXCEEDED
  // (naming how many wait) at the deadline.
  absl::Status Flush(Deadline deadline);

  // Stops taking messages, writes what is queued, half-closes the stream and
  // waits for the server to end it (it acknowledges what it got first). At
  // the deadline, or when not connected, the stream is cancelled instead.
  // Returns the final error, OK after a clean close. Idempotent.
  absl::Status Close(Deadline deadline);

  StreamStatus status() const;

  // The client clock in use (for stamping events on the same clock).
  const MonotonicSource* clock() const { return clock_; }

 private:
  struct Connection;
  struct Entry {
    std::shared_ptr<const Request> request;  // shared so writes need no copy
  };
  absl::Status Admit(Request request);

  void Run();
  // One connection attempt, from Hello to Finish: how the call ended.
  // Sets *welcomed.
  absl::Status RunConnection(bool* welcomed);
  // The reader thread of one attempt: opens the call, writes `hello`, hands
  // the first message to the worker, and after a Welcome reads acks and
  // probes until the call ends.
  void ReadLoop(Connection* conn, Request hello);
  // Applies a Welcome under mu_; a non-OK result is a permanent error.
  absl::Status OnWelcomeLocked(const tickmark::v1::Welcome& w);
  void EnqueueLocked(Request request);
  void SetStateLocked(StreamState s);
  void NotifyState();
  bool HasUnwrittenLocked() const;
  bool AllDoneLocked() const;

  // After an attempt: follows the owner named in its trailing metadata
  // (tickmark-owner), or drops a redirect that did not welcome us.
  void FollowOwnerLocked(const Connection& conn, bool welcomed);

  const MonotonicSource* clock_;
  StreamOptions options_;
  Callbacks callbacks_;
  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<tickmark::v1::Live::Stub> stub_;
  // Where the session's owner is, when a server named another instance;
  // worker thread and mu_.
  std::string redirect_target_;
  std::unique_ptr<tickmark::v1::Live::Stub> redirect_stub_;

  mutable std::mutex mu_;
  std::condition_variable cv_;  // any change of the state below
  StreamStatus status_;                     // guarded by mu_
  bool started_ = false;                    // guarded by mu_
  bool closing_ = false;                    // Close() called; guarded by mu_
  bool stop_ = false;                       // cancel everything; guarded by mu_
  bool worker_done_ = false;                // guarded by mu_
  bool numbering_known_ = false;            // first Welcome seen; guarded by mu_
  uint64_t next_sequence_ = 1;              // guarded by mu_
  std::vector<Request> unnumbered_;         // sent before first Welcome; mu_
  std::map<uint64_t, Entry> pending_;       // by client_sequence; mu_
  uint64_t last_written_ = 0;  // highest sequence written on this connection
  Connection* conn_ = nullptr;              // live attempt; guarded by mu_
  std::thread worker_;
};

extern template class StreamClient<TrainerStream>;
extern template class StreamClient<AgentStream>;
using TrainerClient = StreamClient<TrainerStream>;
using AgentClient = StreamClient<AgentStream>;

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_STREAM_CLIENT_H_

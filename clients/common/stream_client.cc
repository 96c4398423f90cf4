#include "clients/common/stream_client.h"

#include <algorithm>
#include <cmath>
#include <random>
#include <utility>

#include "absl/strings/str_cat.h"
#include "clients/common/channel.h"
#include "clients/common/client_id.h"
#include "clients/common/udp_prober.h"
#include "server/net/probe_datagram.h"
// Header-only: the one absl::Status <-> grpc::Status mapping; no link
// dependency on the rpc library.
#include "server/rpc/status.h"

namespace tickmark::client {

const char* StreamStateName(StreamState s) {
  switch (s) {
    case StreamState::kIdle: return "idle";
    case StreamState::kConnecting: return "connecting";
    case StreamState::kConnected: return "connected";
    case StreamState::kWaiting: return "reconnecting";
    case StreamState::kClosed: return "closed";
    case StreamState::kFailed: return "failed";
  }
  return "unknown";
}

namespace {

// Errors that no reconnect can cure (see the header).
bool IsPermanent(const absl::Status& s, bool welcomed) {
  switch (s.code()) {
    case absl::StatusCode::kUnauthenticated:
    case absl::StatusCode::kPermissionDenied:
    case absl::StatusCode::kNotFound:
    case absl::StatusCode::kFailedPrecondition:
      return true;
    case absl::StatusCode::kInvalidArgument:
      return !welcomed;  // a bad Hello stays bad
    default:
      return false;
  }
}

// The status of a rejecting Ack. Its code is a gRPC code number, the same
// numbers as absl::StatusCode (stream.proto, Ack.code); a number outside the
// known codes is kept in the message and reported as UNKNOWN rather than
// cast into an enum that has no such value.
absl::Status AckStatus(const tickmark::v1::Ack& ack) {
  const int32_t code = ack.code();
  if (code > 0 && code <= static_cast<int32_t>(absl::StatusCode::kUnauthenticated)) {
    return absl::Status(static_cast<absl::StatusCode>(code), ack.message());
  }
  return absl::UnknownError(absl::StrCat("ack code ", code, ": ", ack.message()));
}

// The default client clock (CLOCK_MONOTONIC; server/core/time.h).
const MonotonicSource* SystemClock() {
  static const SystemMonotonic kClock;
  return &kClock;
}

}  // namespace

// One stream attempt. The worker thread owns it. The reader thread opens
// the call, writes the Hello and then only reads; the worker writes
// everything after the Hello, once it has seen the first message arrive
// (under mu_, so the two never write at once). Other threads touch only
// `ctx` (TryCancel is thread-safe, also before the call exists) and the
// fields guarded by the client's mu_.
template <typename Kind>
struct StreamClient<Kind>::Connection {
  grpc::ClientContext ctx;
  tickmark::v1::Live::Stub* stub = nullptr;  // the original target's or a redirect's
  std::string target;
  // Set by the reader thread under mu_ before `first` or `reader_done`.
  std::unique_ptr<grpc::ClientReaderWriter<Request, tickmark::v1::ServerMessage>>
      stream;
  std::thread reader;
  std::optional<tickmark::v1::ServerMessage> first;  // guarded by mu_
  bool welcomed = false;     // guarded by mu_
  bool abandoned = false;    // no Welcome: the worker ends the attempt; mu_
  bool reader_done = false;  // the reader stopped; guarded by mu_
  bool writes_done = false;  // WritesDone() called; guarded by mu_
  std::deque<Request> probe_replies;  // T2 stamped, T3 not yet; guarded by mu_
  // Set when the server answered UNAVAILABLE (could not store now): the
  // connection is ended and everything pending sent again later; mu_.
  absl::Status retry_later;
  // Declared last so it stops first: it reports to the client until then.
  std::unique_ptr<UdpProber> udp;  // when the Welcome offered a probe port
};

template <typename Kind>
StreamClient<Kind>::StreamClient() : clock_(SystemClock()) {}

template <typename Kind>
StreamClient<Kind>::~StreamClient() {
  (void)Close(std::chrono::steady_clock::now() + std::chrono::seconds(2));
}

template <typename Kind>
absl::Status StreamClient<Kind>::Connect(StreamOptions options,
                                         Callbacks callbacks) {
  if (absl::Status s = ValidateClientId(options.client_id); !s.ok()) return s;
  if (options.token.empty()) return absl::InvalidArgumentError("no token");
  if (options.credentials == nullptr) {
    return absl::InvalidArgumentError("no channel credentials");
  }
  if (options.target.empty()) return absl::InvalidArgumentError("no target");
  std::lock_guard<std::mutex> lock(mu_);
  if (started_) return absl::FailedPreconditionError("Connect called twice");
  started_ = true;
  if (options.clock != nullptr) clock_ = options.clock;
  options_ = std::move(options);
  callbacks_ = std::move(callbacks);

  grpc::ChannelArguments args;
  // Keep gRPC's own reconnection in step with ours (100 ms → 5 s).
  args.SetInt(GRPC_ARG_INITIAL_RECONNECT_BACKOFF_MS,
              static_cast<int>(options_.initial_backoff.nanos() / 1'000'000));
  args.SetInt(GRPC_ARG_MIN_RECONNECT_BACKOFF_MS,
              static_cast<int>(options_.initial_backoff.nanos() / 1'000'000));
  args.SetInt(GRPC_ARG_MAX_RECONNECT_BACKOFF_MS,
              static_cast<int>(options_.max_backoff.nanos() / 1'000'000));
  if (options_.keepalive > Duration::Zero()) {
    args.SetInt(GRPC_ARG_KEEPALIVE_TIME_MS,
                static_cast<int>(options_.keepalive.nanos() / 1'000'000));
    args.SetInt(GRPC_ARG_KEEPALIVE_TIMEOUT_MS,
                static_cast<int>(options_.keepalive.nanos() / 1'000'000));
  }
  args.SetString(GRPC_ARG_PRIMARY_USER_AGENT_STRING, options_.source.software);
  channel_ = grpc::CreateCustomChannel(options_.target, options_.credentials, args);
  stub_ = tickmark::v1::Live::NewStub(channel_);
  status_.state = StreamState::kConnecting;
  worker_ = std::thread([this] { Run(); });
  return absl::OkStatus();
}

template <typename Kind>
void StreamClient<Kind>::EnqueueLocked(Request request) {
  const uint64_t seq = next_sequence_++;
  auto shared = std::make_shared<Request>(std::move(request));
  Kind::SetSequence(shared.get(), seq);
  pending_.emplace(seq, Entry{std::move(shared)});
}

template <typename Kind>
absl::Status StreamClient<Kind>::Send(Payload payload) {
  const ClockDiscipline* discipline = nullptr;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (started_ && options_.send_realtime) {
      discipline = options_.discipline != nullptr ? options_.discipline : KernelDiscipline::Get();
    }
  }
  // Read now, close to the event: the server grows the bound with the
  // event's age (docs/time-model.md, "Disciplined clocks").
  if (discipline != nullptr && !Kind::HasRealtime(payload)) {
    if (auto r = ReadRealtimeAt(Kind::EventTime(payload), *clock_, *discipline)) {
      Kind::SetRealtime(&payload, r->realtime_ns, r->bound.nanos());
    }
  }
  Request request;
  *Kind::MutablePayload(&request) = std::move(payload);
  return Admit(std::move(request));
}

template <typename Kind>
absl::Status StreamClient<Kind>::SendRequest(Request request) {
  if (!Kind::SetSequence(&request, 0)) {
    return absl::InvalidArgumentError("SendRequest: the message carries no client sequence");
  }
  return Admit(std::move(request));
}

template <typename Kind>
absl::Status StreamClient<Kind>::Admit(Request request) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (!started_) return absl::FailedPreconditionError("not connected yet");
    if (closing_) return absl::FailedPreconditionError("client is closed");
    if (status_.state == StreamState::kFailed) {
      return absl::FailedPreconditionError(
          absl::StrCat("client stopped: ", status_.last_error.ToString()));
    }
    if (pending_.size() + unnumbered_.size() >= options_.max_pending) {
      return absl::ResourceExhaustedError(absl::StrCat(
          options_.max_pending, " messages already wait for acknowledgement"));
    }
    ++status_.sent;
    if (numbering_known_) {
      EnqueueLocked(std::move(request));
    } else {
      unnumbered_.push_back(std::move(request));
    }
  }
  cv_.notify_all();
  return absl::OkStatus();
}

template <typename Kind>
bool StreamClient<Kind>::AllDoneLocked() const {
  return pending_.empty() && unnumbered_.empty();
}

template <typename Kind>
absl::Status StreamClient<Kind>::Flush(Deadline deadline) {
  std::unique_lock<std::mutex> lock(mu_);
  bool stopped = false;
  cv_.wait_until(lock, deadline, [&] {
    stopped = worker_done_ || status_.state == StreamState::kFailed;
    return AllDoneLocked() || stopped;
  });
  if (AllDoneLocked()) return absl::OkStatus();
  const size_t waiting = pending_.size() + unnumbered_.size();
  if (status_.state == StreamState::kFailed) return status_.last_error;
  if (stopped) {
    return absl::FailedPreconditionError(
        absl::StrCat("client closed with ", waiting, " unacknowledged"));
  }
  return absl::DeadlineExceededError(
      absl::StrCat(waiting, " messages still unacknowledged"));
}

template <typename Kind>
absl::Status StreamClient<Kind>::Close(Deadline deadline) {
  std::unique_lock<std::mutex> lock(mu_);
  if (!started_) {
    started_ = true;  // a later Connect() must not start a thread
    closing_ = true;
    worker_done_ = true;
    status_.state = StreamState::kClosed;
    return absl::OkStatus();
  }
  if (!closing_) {
    closing_ = true;
    // Without a Welcome there is nothing to close cleanly.
    if (conn_ != nullptr && !conn_->welcomed) conn_->ctx.TryCancel();
    cv_.notify_all();
  }
  if (!cv_.wait_until(lock, deadline, [this] { return worker_done_; })) {
    stop_ = true;
    if (conn_ != nullptr) conn_->ctx.TryCancel();
    cv_.notify_all();
    cv_.wait(lock, [this] { return worker_done_; });
  }
  absl::Status result;
  if (status_.state == StreamState::kFailed) {
    result = status_.last_error;
  } else if (stop_) {
    result = absl::DeadlineExceededError(
        "the server did not end the stream by the close deadline; cancelled");
  }
  lock.unlock();
  if (worker_.joinable() && worker_.get_id() != std::this_thread::get_id()) {
    worker_.join();
  }
  return result;
}

template <typename Kind>
StreamStatus StreamClient<Kind>::status() const {
  std::lock_guard<std::mutex> lock(mu_);
  StreamStatus s = status_;
  s.pending = pending_.size() + unnumbered_.size();
  return s;
}

template <typename Kind>
void StreamClient<Kind>::SetStateLocked(StreamState s) {
  status_.state = s;
  cv_.notify_all();
}

template <typename Kind>
void StreamClient<Kind>::NotifyState() {
  if (callbacks_.on_state) callbacks_.on_state(status());
}

template <typename Kind>
bool StreamClient<Kind>::HasUnwrittenLocked() const {
  return pending_.upper_bound(last_written_) != pending_.end();
}

template <typename Kind>
absl::Status StreamClient<Kind>::OnWelcomeLocked(const tickmark::v1::Welcome& w) {
  const uint64_t last = w.last_client_sequence();
  if (!numbering_known_) {
    // Continue above what the server holds for this id (a restarted program).
    numbering_known_ = true;
    next_sequence_ = last + 1;
    std::vector<Request> waiting = std::move(unnumbered_);
    unnumbered_.clear();
    for (Request& p : waiting) EnqueueLocked(std::move(p));
  } else if (last >= next_sequence_) {
    return absl::FailedPreconditionError(absl::StrCat(
        "the server holds client sequence ", last, " for client id \"",
        options_.client_id, "\" but this client assigned only up to ",
        next_sequence_ - 1, ": another program uses the same client id"));
  }
  status_.session_id = w.session_id();
  status_.subject = w.subject();
  ++status_.connections;
  return absl::OkStatus();
}

template <typename Kind>
void StreamClient<Kind>::ReadLoop(Connection* conn, Request hello) {
  auto stream = Kind::Open(conn->stub, &conn->ctx);
  tickmark::v1::ServerMessage msg;
  // Stamped once the call is open, so connecting does not count as transit.
  hello.mutable_hello()->set_sent_client_ns(clock_->NowNanos());
  const bool hello_ok = stream->Write(hello);
  {
    std::lock_guard<std::mutex> lock(mu_);
    conn->stream = std::move(stream);
  }
  if (hello_ok && conn->stream->Read(&msg)) {
    std::unique_lock<std::mutex> lock(mu_);
    conn->first = std::move(msg);
    msg.Clear();
    cv_.notify_all();
    // Nothing after the first message is taken from a server that did not
    // welcome this client.
    cv_.wait(lock, [conn] { return conn->welcomed || conn->abandoned; });
    if (conn->abandoned) {
      conn->reader_done = true;
      cv_.notify_all();
      return;
    }
  } else {
    std::lock_guard<std::mutex> lock(mu_);
    conn->reader_done = true;
    cv_.notify_all();
    return;
  }
  while (conn->stream->Read(&msg)) {
    if (msg.has_probe()) {
      const int64_t t2 = clock_->NowNanos();  // as close to the read as we can
      Request reply;
      auto* r = reply.mutable_probe_reply();
      r->set_probe_id(msg.probe().probe_id());
      r->set_t1_session_ns(msg.probe().t1_session_ns());
      r->set_t2_client_ns(t2);
      {
        std::lock_guard<std::mutex> lock(mu_);
        conn->probe_replies.push_back(std::move(reply));
      }
      cv_.notify_all();
    } else if (msg.has_ack()) {
      const tickmark::v1::Ack& ack = msg.ack();
      std::shared_ptr<const Request> request;
      AckInfo info;
      {
        std::lock_guard<std::mutex> lock(mu_);
        auto it = pending_.find(ack.client_sequence());
        // An ack for nothing pending (a server bug, or a second ack for
        // one sequence) changes nothing.
        if (it == pending_.end()) continue;
        if (ack.code() == static_cast<int32_t>(absl::StatusCode::kUnavailable)) {
          // The server could not store it now (its disk is full): keep it
          // pending and end this connection, so that the reconnect, after
          // a growing backoff, sends everything unacknowledged again.
          if (conn->retry_later.ok()) conn->retry_later = AckStatus(ack);
          conn->ctx.TryCancel();
          continue;
        }
        request = std::move(it->second.request);
        pending_.erase(it);
        if (ack.code() == 0) {
          ++status_.acked;
          info.client_sequence = ack.client_sequence();
          info.sequence = ack.sequence();
          info.duplicate = ack.duplicate();
          info.event_session_ns = ack.event_session_ns();
          info.uncertainty_ns = ack.uncertainty_ns();
          status_.last_ack = info;
        } else {
          ++status_.rejected;
        }
      }
      cv_.notify_all();
      const bool payload = Kind::HasPayload(*request);
      if (ack.code() == 0) {
        if (payload && callbacks_.on_ack) {
          callbacks_.on_ack(info, Kind::GetPayload(*request));
        } else if (!payload && callbacks_.on_request_ack) {
          callbacks_.on_request_ack(info, *request);
        }
      } else if (payload && callbacks_.on_rejected) {
        callbacks_.on_rejected(
            ack.client_sequence(), Kind::GetPayload(*request),
            AckStatus(ack));
      } else if (!payload && callbacks_.on_request_rejected) {
        callbacks_.on_request_rejected(ack.client_sequence(), *request, AckStatus(ack));
      }
    } else if (!msg.has_welcome() &&
               msg.body_case() != tickmark::v1::ServerMessage::BODY_NOT_SET) {
      // E.g. the Calibration fitted for a finish, just before its Ack.
      if (callbacks_.on_server_message) callbacks_.on_server_message(msg);
    }
    // A second Welcome, or an empty body: nothing to do.
  }
  std::lock_guard<std::mutex> lock(mu_);
  conn->reader_done = true;
  cv_.notify_all();
}

template <typename Kind>
absl::Status StreamClient<Kind>::RunConnection(bool* welcomed) {
  *welcomed = false;
  Connection conn;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (closing_ || stop_) return absl::CancelledError("closed");
    // Several server instances (docs/architecture.md, "More than one
    // machine"): go where the last answer said the session's owner is, and
    // name the session so a load balancer can route by it.
    conn.stub = redirect_stub_ ? redirect_stub_.get() : stub_.get();
    conn.target = redirect_stub_ ? redirect_target_ : options_.target;
    if (!status_.session_id.empty()) {
      conn.ctx.AddMetadata(rpc::kSessionMetadata, status_.session_id);
    }
    conn_ = &conn;
    last_written_ = 0;  // resend everything unacknowledged
    SetStateLocked(StreamState::kConnecting);
  }
  Request hello;
  auto* h = hello.mutable_hello();
  h->set_token(options_.token);
  h->set_client_id(options_.client_id);
  h->set_source_kind(options_.source.kind);
  h->set_source_description(options_.source.description);
  h->set_software(options_.source.software);
  conn.reader = std::thread(
      [this, &conn, hello = std::move(hello)]() mutable { ReadLoop(&conn, std::move(hello)); });

  std::unique_lock<std::mutex> lock(mu_);
  // Ends an attempt that got no usable Welcome: `why`, or else the status
  // the call ended with.
  auto give_up = [&](absl::Status why) {
    conn.abandoned = true;
    // A call that is already over keeps the status the server gave it;
    // cancelling would replace that with CANCELLED.
    if (!conn.reader_done) conn.ctx.TryCancel();
    cv_.notify_all();
    lock.unlock();
    conn.reader.join();
    absl::Status finished = rpc::FromGrpc(conn.stream->Finish());
    lock.lock();
    conn_ = nullptr;
    FollowOwnerLocked(conn, /*welcomed=*/false);
    return why.ok() ? finished : why;
  };
  auto first_arrived = [&] { return conn.first.has_value() || conn.reader_done; };
  if (options_.hello_timeout > Duration::Zero()) {
    const auto deadline =
        std::chrono::steady_clock::now() + std::chrono::nanoseconds(options_.hello_timeout.nanos());
    if (!cv_.wait_until(lock, deadline, first_arrived)) {
      // A server that takes the stream but never welcomes would otherwise
      // hold this client forever; the next attempt may reach a healthy one.
      return give_up(absl::DeadlineExceededError(absl::StrCat(
          "no Welcome from ", options_.target, " within ",
          options_.hello_timeout.nanos() / 1'000'000, " ms of the Hello")));
    }
  } else {
    cv_.wait(lock, first_arrived);
  }
  if (!conn.first.has_value()) return give_up(absl::OkStatus());
  if (!conn.first->has_welcome()) {
    return give_up(absl::InternalError("server sent something other than a Welcome first"));
  }
  const tickmark::v1::Welcome w = conn.first->welcome();
  if (absl::Status s = OnWelcomeLocked(w); !s.ok()) return give_up(s);
  conn.welcomed = true;
  *welcomed = true;
  SetStateLocked(StreamState::kConnected);
  lock.unlock();
  NotifyState();
  if (options_.udp_probes && w.udp_probe_port() != 0 && w.udp_probe_port() <= 65535 &&
      w.udp_probe_key().size() == net::kProbeKeyBytes) {
    const std::string host = TargetHost(options_.target);
    if (host != "unix") {
      conn.udp = UdpProber::Start(host, w.udp_probe_port(), w.udp_probe_tag(), w.udp_probe_key(),
                                  clock_, options_.udp_probe_interval, [this] {
                                    std::lock_guard<std::mutex> l(mu_);
                                    ++status_.udp_probes;
                                    cv_.notify_all();
                                  });
    }
  }

  // The writer: this thread is the only one that writes after the Hello.
  lock.lock();
  while (true) {
    cv_.wait(lock, [&] {
      return conn.reader_done || stop_ || !conn.probe_replies.empty() ||
             HasUnwrittenLocked() || (closing_ && !conn.writes_done);
    });
    if (conn.reader_done || stop_) break;
    if (!conn.probe_replies.empty()) {
      Request reply = std::move(conn.probe_replies.front());
      conn.probe_replies.pop_front();
      ++status_.probes_answered;
      lock.unlock();
      reply.mutable_probe_reply()->set_t3_client_ns(clock_->NowNanos());
      const bool ok = conn.stream->Write(reply);
      lock.lock();
      if (!ok) break;
      continue;
    }
    if (HasUnwrittenLocked()) {
      auto it = pending_.upper_bound(last_written_);
      std::shared_ptr<const Request> request = it->second.request;
      last_written_ = it->first;
      lock.unlock();
      const bool ok = conn.stream->Write(*request);
      lock.lock();
      if (!ok) break;
      continue;
    }
    // closing_ and everything written: half-close, then let the server end
    // the stream once it has acknowledged what it got.
    conn.writes_done = true;
    lock.unlock();
    conn.stream->WritesDone();
    lock.lock();
  }
  if (stop_) conn.ctx.TryCancel();
  lock.unlock();
  // A failed write means the call is over, so the reader's Read fails too.
  conn.reader.join();
  conn.udp.reset();
  absl::Status s = rpc::FromGrpc(conn.stream->Finish());
  lock.lock();
  conn_ = nullptr;
  FollowOwnerLocked(conn, conn.welcomed);
  if (!conn.retry_later.ok() && !stop_ && !closing_) {
    // Not a healthy connection: back off as after a failed attempt.
    *welcomed = false;
    return conn.retry_later;
  }
  return s;
}

template <typename Kind>
void StreamClient<Kind>::FollowOwnerLocked(const Connection& conn, bool welcomed) {
  const auto& trailers = conn.ctx.GetServerTrailingMetadata();
  auto it = trailers.find(rpc::kOwnerMetadata);
  if (it != trailers.end()) {
    const std::string owner(it->second.data(), it->second.size());
    if (owner.empty() || owner == conn.target) return;
    if (owner == options_.target) {
      redirect_stub_.reset();
      redirect_target_.clear();
      return;
    }
    grpc::ChannelArguments args;
    args.SetString(GRPC_ARG_PRIMARY_USER_AGENT_STRING, options_.source.software);
    redirect_target_ = owner;
    redirect_stub_ = tickmark::v1::Live::NewStub(
        grpc::CreateCustomChannel(owner, options_.credentials, args));
    ++status_.redirects;
    return;
  }
  // A redirect target that did not welcome us (the owner died, or moved
  // without saying where): back to the original target (the balancer).
  if (!welcomed && redirect_stub_ && conn.target == redirect_target_) {
    redirect_stub_.reset();
    redirect_target_.clear();
  }
}

template <typename Kind>
void StreamClient<Kind>::Run() {
  std::mt19937_64 rng(std::random_device{}());
  int failures = 0;  // consecutive attempts without a Welcome
  std::unique_lock<std::mutex> lock(mu_, std::defer_lock);
  while (true) {
    bool welcomed = false;
    absl::Status s = RunConnection(&welcomed);
    lock.lock();
    if (!s.ok() && !(closing_ && s.code() == absl::StatusCode::kCancelled)) {
      status_.last_error = s;
    }
    if (IsPermanent(s, welcomed)) {
      SetStateLocked(StreamState::kFailed);
      break;
    }
    if (closing_ || stop_) {
      SetStateLocked(StreamState::kClosed);
      break;
    }
    failures = welcomed ? 0 : failures + 1;
    const double base_ns =
        std::min(static_cast<double>(options_.max_backoff.nanos()),
                 static_cast<double>(options_.initial_backoff.nanos()) *
                     std::pow(2.0, std::max(0, failures - 1)));
    std::uniform_real_distribution<double> jitter(-options_.backoff_jitter,
                                                  options_.backoff_jitter);
    const auto wait = std::chrono::nanoseconds(
        static_cast<int64_t>(base_ns * (1.0 + jitter(rng))));
    SetStateLocked(StreamState::kWaiting);
    lock.unlock();
    NotifyState();
    lock.lock();
    cv_.wait_until(lock, std::chrono::steady_clock::now() + wait,
                   [this] { return closing_ || stop_; });
    if (closing_ || stop_) {
      SetStateLocked(StreamState::kClosed);
      break;
    }
    ++status_.reconnects;
    lock.unlock();
  }
  worker_done_ = true;
  cv_.notify_all();
  lock.unlock();
  NotifyState();
}

template class StreamClient<TrainerStream>;
template class StreamClient<AgentStream>;

}  // namespace tickmark::client

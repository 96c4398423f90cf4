#include "clients/common/stream_client.h"

#include <netdb.h>
#include <poll.h>
#include <sys/eventfd.h>
#include <sys/socket.h>
#include <unistd.h>

#include <algorithm>
#include <array>
#include <cmath>
#include <random>
#include <utility>

#include "absl/strings/str_cat.h"
#include "clients/common/client_id.h"
#include "clients/common/monotonic_clock.h"
#include "server/net/probe_datagram.h"

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

absl::Status FromGrpc(const grpc::Status& s) {
  return absl::Status(static_cast<absl::StatusCode>(s.error_code()),
                      s.error_message());
}

// Errors that no reconnect can cure (see the header).
bool IsPermanent(const grpc::Status& s, bool welcomed) {
  switch (s.error_code()) {
    case grpc::StatusCode::UNAUTHENTICATED:
    case grpc::StatusCode::PERMISSION_DENIED:
    case grpc::StatusCode::NOT_FOUND:
    case grpc::StatusCode::FAILED_PRECONDITION:
      return true;
    case grpc::StatusCode::INVALID_ARGUMENT:
      return !welcomed;  // a bad Hello stays bad
    default:
      return false;
  }
}

// The host part of a gRPC target ("host:port", "[v6]:port", with an optional
// "dns:///", "ipv4:" or "ipv6:" scheme).
std::string TargetHost(std::string target) {
  for (const char* scheme : {"dns:///", "dns:", "ipv4:", "ipv6:"}) {
    if (target.rfind(scheme, 0) == 0) {
      target = target.substr(std::string(scheme).size());
      break;
    }
  }
  if (!target.empty() && target.front() == '[') return target.substr(1, target.find(']') - 1);
  if (auto colon = target.rfind(':'); colon != std::string::npos) return target.substr(0, colon);
  return target;
}

}  // namespace

// The client's half of the UDP probe exchange (server/net/probe_datagram.h):
// request, then on the challenge stamp T2, answer with T1, T2 and T3 (T3
// right before the send). One thread; a connected UDP socket, so only the
// server's datagrams arrive; an eventfd wakes it to stop.
class UdpProber {
 public:
  // The first probes come this fast, so the model sharpens soon after the
  // Welcome, as the server's own burst does.
  static constexpr int kBurst = 8;
  static constexpr Duration kBurstSpacing = Duration::Millis(50);
  // A challenge later than this is given up; the next request has a new id.
  static constexpr Duration kReplyTimeout = Duration::Millis(500);

  // nullptr if the host does not resolve or no socket can be made: the
  // stream's own probes still work, so this is not an error.
  static std::unique_ptr<UdpProber> Start(const std::string& host, uint32_t port, uint64_t tag,
                                          std::string key, const MonotonicSource* clock,
                                          Duration interval, std::function<void()> on_exchange) {
    addrinfo hints{};
    hints.ai_socktype = SOCK_DGRAM;
    addrinfo* found = nullptr;
    if (getaddrinfo(host.c_str(), std::to_string(port).c_str(), &hints, &found) != 0) {
      return nullptr;
    }
    int fd = -1;
    for (addrinfo* a = found; a != nullptr && fd < 0; a = a->ai_next) {
      fd = socket(a->ai_family, a->ai_socktype | SOCK_CLOEXEC, a->ai_protocol);
      if (fd >= 0 && connect(fd, a->ai_addr, a->ai_addrlen) != 0) {
        close(fd);
        fd = -1;
      }
    }
    freeaddrinfo(found);
    if (fd < 0) return nullptr;
    const int wake = eventfd(0, EFD_CLOEXEC);
    if (wake < 0) {
      close(fd);
      return nullptr;
    }
    std::unique_ptr<UdpProber> p(new UdpProber(fd, wake, tag, std::move(key), clock, interval,
                                               std::move(on_exchange)));
    p->thread_ = std::thread([raw = p.get()] { raw->Run(); });
    return p;
  }

  ~UdpProber() {
    const uint64_t one = 1;
    (void)!write(wake_, &one, sizeof one);
    thread_.join();
    close(fd_);
    close(wake_);
  }

 private:
  UdpProber(int fd, int wake, uint64_t tag, std::string key, const MonotonicSource* clock,
            Duration interval, std::function<void()> on_exchange)
      : fd_(fd), wake_(wake), tag_(tag), key_(std::move(key)), clock_(clock),
        interval_(interval), on_exchange_(std::move(on_exchange)) {}

  // Waits until the socket is readable (true) or the timeout passes or a
  // stop is asked for (false; stopping_ tells which).
  bool WaitReadable(Duration timeout) {
    std::array<pollfd, 2> fds{pollfd{fd_, POLLIN, 0}, pollfd{wake_, POLLIN, 0}};
    const int ms = static_cast<int>(std::max<int64_t>(0, timeout.nanos() / 1'000'000));
    if (poll(fds.data(), fds.size(), ms) <= 0) return false;
    if (fds[1].revents != 0) {
      stopping_ = true;
      return false;
    }
    return (fds[0].revents & POLLIN) != 0;
  }

  // Schedules run on the process's steady clock: the client clock (clock_)
  // may be a test's hand-driven one and only stamps T2 and T3.
  static int64_t SteadyNanos() {
    return std::chrono::duration_cast<std::chrono::nanoseconds>(
               std::chrono::steady_clock::now().time_since_epoch())
        .count();
  }

  void Run() {
    using net::ProbeDatagram;
    using net::ProbeDatagramKind;
    uint64_t id = 0;
    int sent = 0;
    std::array<char, net::kMaxProbeDatagramBytes + 1> buf{};
    while (!stopping_) {
      ProbeDatagram request{ProbeDatagramKind::kRequest, tag_, ++id};
      const std::string out = net::EncodeProbeDatagram(request, key_);
      if (send(fd_, out.data(), out.size(), 0) >= 0) {
        const int64_t give_up = SteadyNanos() + kReplyTimeout.nanos();
        while (!stopping_) {
          const int64_t left = give_up - SteadyNanos();
          if (left <= 0 || !WaitReadable(Duration::Nanos(left))) break;
          const ssize_t n = recv(fd_, buf.data(), buf.size(), 0);
          const int64_t t2 = clock_->NowNanos();  // as close to the read as we can
          if (n <= 0) continue;  // e.g. ICMP port unreachable from an earlier send
          ProbeDatagram c;
          if (net::DecodeProbeDatagram(std::string_view(buf.data(), static_cast<size_t>(n)),
                                       key_, &c) != net::ProbeDecodeResult::kOk ||
              c.kind != ProbeDatagramKind::kChallenge || c.tag != tag_ || c.id != id) {
            continue;  // stale or foreign; keep waiting for ours
          }
          ProbeDatagram answer{ProbeDatagramKind::kAnswer, tag_, id, c.t1_session_ns, t2, 0};
          answer.t3_client_ns = clock_->NowNanos();
          const std::string a = net::EncodeProbeDatagram(answer, key_);
          if (send(fd_, a.data(), a.size(), 0) >= 0) on_exchange_();
          break;
        }
      }
      ++sent;
      const Duration gap = sent < kBurst ? kBurstSpacing : interval_;
      // Sleeps until the next probe unless asked to stop; datagrams that
      // arrive meanwhile are late challenges, read and dropped.
      const int64_t next = SteadyNanos() + gap.nanos();
      while (!stopping_) {
        const int64_t left = next - SteadyNanos();
        if (left <= 0) break;
        if (WaitReadable(Duration::Nanos(left))) (void)recv(fd_, buf.data(), buf.size(), 0);
      }
    }
  }

  const int fd_;     // connected UDP socket
  const int wake_;   // eventfd: written to stop
  const uint64_t tag_;
  const std::string key_;
  const MonotonicSource* const clock_;  // the client clock; T2 and T3
  const Duration interval_;
  const std::function<void()> on_exchange_;
  bool stopping_ = false;  // only the thread touches it
  std::thread thread_;
};

// One stream attempt. The worker thread owns it; the reader thread uses
// `stream` for reads only; other threads touch only `ctx` (TryCancel is
// thread-safe) and the fields guarded by the client's mu_.
template <typename Kind>
struct StreamClient<Kind>::Connection {
  grpc::ClientContext ctx;
  std::unique_ptr<grpc::ClientReaderWriter<Request, tickmark::v1::ServerMessage>>
      stream;
  std::thread reader;
  bool welcomed = false;     // guarded by mu_
  bool reader_done = false;  // Read() returned false; guarded by mu_
  bool writes_done = false;  // WritesDone() called; guarded by mu_
  std::deque<Request> probe_replies;  // T2 stamped, T3 not yet; guarded by mu_
  // Declared last so it stops first: it reports to the client until then.
  std::unique_ptr<UdpProber> udp;  // when the Welcome offered a probe port
};

template <typename Kind>
StreamClient<Kind>::StreamClient() : clock_(SystemMonotonic::Get()) {}

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
void StreamClient<Kind>::EnqueueLocked(Payload payload) {
  const uint64_t seq = next_sequence_++;
  auto request = std::make_shared<Request>();
  Payload* p = Kind::MutablePayload(request.get());
  *p = std::move(payload);
  p->set_client_sequence(seq);
  pending_.emplace(seq, Entry{std::move(request)});
}

template <typename Kind>
absl::Status StreamClient<Kind>::Send(Payload payload) {
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
      EnqueueLocked(std::move(payload));
    } else {
      unnumbered_.push_back(std::move(payload));
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
    std::vector<Payload> waiting = std::move(unnumbered_);
    unnumbered_.clear();
    for (Payload& p : waiting) EnqueueLocked(std::move(p));
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
void StreamClient<Kind>::ReadLoop(Connection* conn) {
  tickmark::v1::ServerMessage msg;
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
      if (ack.code() == 0) {
        if (callbacks_.on_ack) callbacks_.on_ack(info, Kind::GetPayload(*request));
      } else if (callbacks_.on_rejected) {
        callbacks_.on_rejected(
            ack.client_sequence(), Kind::GetPayload(*request),
            absl::Status(static_cast<absl::StatusCode>(ack.code()), ack.message()));
      }
    }
    // A second Welcome, or a body from a newer protocol: nothing to do.
  }
  std::lock_guard<std::mutex> lock(mu_);
  conn->reader_done = true;
  cv_.notify_all();
}

template <typename Kind>
grpc::Status StreamClient<Kind>::RunConnection(bool* welcomed) {
  *welcomed = false;
  Connection conn;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (closing_ || stop_) return grpc::Status(grpc::StatusCode::CANCELLED, "closed");
    conn_ = &conn;
    last_written_ = 0;  // resend everything unacknowledged
    SetStateLocked(StreamState::kConnecting);
  }
  auto forget = [&] {
    std::lock_guard<std::mutex> lock(mu_);
    conn_ = nullptr;
  };
  conn.stream = Kind::Open(stub_.get(), &conn.ctx);

  Request hello;
  auto* h = hello.mutable_hello();
  h->set_token(options_.token);
  h->set_client_id(options_.client_id);
  h->set_source_kind(options_.source.kind);
  h->set_source_description(options_.source.description);
  h->set_software(options_.source.software);
  h->set_sent_client_ns(clock_->NowNanos());
  tickmark::v1::ServerMessage first;
  if (!conn.stream->Write(hello) || !conn.stream->Read(&first)) {
    grpc::Status s = conn.stream->Finish();
    forget();
    return s;
  }
  if (!first.has_welcome()) {
    conn.ctx.TryCancel();
    conn.stream->Finish();
    forget();
    return grpc::Status(grpc::StatusCode::INTERNAL,
                        "server sent something other than a Welcome first");
  }
  {
    std::unique_lock<std::mutex> lock(mu_);
    absl::Status s = OnWelcomeLocked(first.welcome());
    if (!s.ok()) {
      conn.ctx.TryCancel();
      conn_ = nullptr;
      lock.unlock();
      conn.stream->Finish();
      return grpc::Status(static_cast<grpc::StatusCode>(s.code()),
                          std::string(s.message()));
    }
    conn.welcomed = true;
    *welcomed = true;
    SetStateLocked(StreamState::kConnected);
  }
  NotifyState();
  const tickmark::v1::Welcome& w = first.welcome();
  if (options_.udp_probes && w.udp_probe_port() != 0 && w.udp_probe_port() <= 65535 &&
      w.udp_probe_key().size() == net::kProbeKeyBytes) {
    conn.udp = UdpProber::Start(TargetHost(options_.target), w.udp_probe_port(), w.udp_probe_tag(),
                                w.udp_probe_key(), clock_, options_.udp_probe_interval, [this] {
                                  std::lock_guard<std::mutex> lock(mu_);
                                  ++status_.udp_probes;
                                  cv_.notify_all();
                                });
  }
  conn.reader = std::thread([this, &conn] { ReadLoop(&conn); });

  // The writer: this thread is the only one that writes to the stream.
  std::unique_lock<std::mutex> lock(mu_);
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
  grpc::Status s = conn.stream->Finish();
  forget();
  return s;
}

template <typename Kind>
void StreamClient<Kind>::Run() {
  std::mt19937_64 rng(std::random_device{}());
  int failures = 0;  // consecutive attempts without a Welcome
  std::unique_lock<std::mutex> lock(mu_, std::defer_lock);
  while (true) {
    bool welcomed = false;
    grpc::Status s = RunConnection(&welcomed);
    lock.lock();
    if (!s.ok() && !(closing_ && s.error_code() == grpc::StatusCode::CANCELLED)) {
      status_.last_error = FromGrpc(s);
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

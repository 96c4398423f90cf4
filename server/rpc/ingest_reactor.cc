#include "server/rpc/ingest_reactor.h"

#include <openssl/rand.h>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <limits>
#include <thread>
#include <tuple>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/ops/server_metrics.h"
#include "server/rpc/calibration_builder.h"
#include "server/rpc/credit_driver.h"
#include "server/rpc/status.h"
#include "server/rpc/validation.h"
#include "tickmark/version.h"

namespace tickmark::rpc {
namespace {

namespace v1 = tickmark::v1;

// Uncertainty stated for a time mapped before any probe came back: the
// hello's one-way delay is unknown, so only a generous bound can be given.
constexpr Duration kHelloMappingUncertainty = Duration::Seconds(1);
// How many sent probes are remembered for matching late replies.
constexpr size_t kRememberedProbes = 16;
constexpr int64_t kNever = std::numeric_limits<int64_t>::max();
// How long a stream is not read after a message of it was refused by a rate
// limit (common practice, no source: a short tarpit).
constexpr Duration kRefusalPause = Duration::Millis(10);
// When a timer fired but what was due could not be done yet, it is tried
// again this much later (the old ticker's fixed period).
constexpr Duration kRetryTick = Duration::Millis(10);

// An ack for a record the ledger could not store for lack of space: the
// client should keep the message and send it again later (see OnAck).
void RetryableIfStoreFull(v1::Ack* ack) {
  if (ack->code() == static_cast<int32_t>(absl::StatusCode::kResourceExhausted)) {
    ack->set_code(static_cast<int32_t>(absl::StatusCode::kUnavailable));
    ack->set_message(Cat(ack->message(), " (not stored; send it again later)"));
  }
}

// Counts an acknowledged message for /metrics (server/ops/server_metrics.h):
// its outcome; for a stored one, its ack latency (arrival is the record's
// written time) and its time's stated uncertainty.
void NoteAck(const v1::Ack& ack, const v1::Record& sent, SessionTime now) {
  const ops::IngestKind kind = sent.has_step()                ? ops::IngestKind::kStep
                               : sent.has_calibration_event() ? ops::IngestKind::kCalibrationEvent
                                                              : ops::IngestKind::kFeedback;
  ops::CountIngest(kind, ack.code(), ack.duplicate());
  if (ack.code() != 0) return;
  ops::ObserveAckLatency(kind, now.nanos() - sent.written_session_ns());
  if (ack.duplicate()) return;
  ops::ObserveClockUncertainty(kind, sent.has_step() ? sent.step().uncertainty_ns()
                                     : sent.has_calibration_event()
                                         ? sent.calibration_event().uncertainty_ns()
                                         : sent.feedback().uncertainty_ns());
}

// How a feedback's or step's time was mapped (records.proto, Feedback
// fields 12-17, Step 16-21); the client's reading is set by the caller.
template <typename R>
void SetTimeSource(R* r, const MappedEvent& m, const RealtimeReading& reading) {
  const bool realtime = m.decision.source == TimeSourceChoice::kRealtime;
  r->set_time_source(realtime ? v1::TIME_SOURCE_REALTIME : v1::TIME_SOURCE_ROUND_TRIP);
  r->set_client_realtime_bound_ns(reading.bound.nanos());
  r->set_server_realtime_bound_ns(m.server_bound.nanos());
  r->set_round_trip_uncertainty_ns(m.round_trip_uncertainty.nanos());
  r->set_time_source_reason(TimeSourceReasonName(m.decision.reason));
}

bool ThroughRealtime(const MappedEvent& m) {
  return m.decision.source == TimeSourceChoice::kRealtime;
}

// A real-time mapping the plausibility checks refuse (an event after its
// arrival beyond its bound, or older than any allowed) had a false bound
// (docs/time-model.md, "Disciplined clocks"): the round trip's mapping
// replaces it, and is judged in its turn, so nothing is refused for it.
MappedEvent AsRoundTrip(MappedEvent m) {
  m.at = m.round_trip_at;
  m.uncertainty = m.round_trip_uncertainty;
  m.decision.source = TimeSourceChoice::kRoundTrip;
  m.decision.reason = TimeSourceReason::kImplausible;
  m.decision.uncertainty = m.round_trip_uncertainty;
  return m;
}

std::string BearerFromMetadata(const grpc::CallbackServerContext& ctx) {
  const auto& md = ctx.client_metadata();
  auto it = md.find("authorization");
  if (it == md.end()) return "";
  return std::string(BearerSecret(std::string_view(it->second.data(), it->second.size())));
}

}  // namespace

template <typename Side>
IngestReactor<Side>::IngestReactor(LiveService* service, grpc::CallbackServerContext* ctx)
    : service_(service),
      ctx_(ctx),
      strand_(std::make_shared<Strand>(&service->pool())),
      model_(service->options().clock) {}

template <typename Side>
void IngestReactor<Side>::Post(std::function<void(IngestReactor&)> fn) {
  std::shared_ptr<IngestReactor> self = this->weak_from_this().lock();
  if (!self) return;
  strand_->Post([self = std::move(self), fn = std::move(fn)] { fn(*self); });
}

template <typename Side>
void IngestReactor<Side>::Start(const absl::Status& admitted, std::string peer_host) {
  self_ = this->shared_from_this();
  peer_ = ctx_->peer();
  peer_host_ = std::move(peer_host);
  metadata_secret_ = BearerFromMetadata(*ctx_);
  if (!admitted.ok()) {
    finished_ = true;
    end_reason_ = std::string(admitted.message());
    Finish(ToGrpc(admitted));
    return;
  }
  admitted_ = true;
  ops::StreamOpened(Side::kRole == v1::ROLE_AGENT ? ops::StreamRole::kAgent
                                                  : ops::StreamRole::kTrainer);
  const Duration timeout = service_->options().hello_timeout;
  const int64_t deadline =
      timeout > Duration::Zero() ? service_->limits_clock()->NowNanos() + timeout.nanos() : kNever;
  hello_deadline_.store(deadline);
  // Timers are one-shot (ticker.h): the hello deadline on the limits clock;
  // the stream's own due times are armed by UpdateTickDue.
  if (deadline != kNever) service_->ticker().WakeAt(self_, service_->limits_clock(), deadline);
  // Opt-in ack coalescing (stream.proto, AckBatch); old clients get one Ack
  // per message.
  {
    const auto& md = ctx_->client_metadata();
    auto it = md.find("tickmark-ack-batch");
    batch_acks_ = it != md.end() && std::string_view(it->second.data(), it->second.size()) == "1";
  }
  StartReadOnce();
}

template <typename Side>
void IngestReactor<Side>::End(const grpc::Status& status) {
  Post([status](IngestReactor& r) { r.FinishNow(status); });
}

template <typename Side>
void IngestReactor<Side>::OnReadDone(bool ok) {
  const int64_t arrival_mono = service_->mono()->NowNanos();
  // Every outcome is posted BEFORE read_in_flight_ is cleared: clearing it
  // lets the strand (MaybeRead) start the next read, whose OnReadDone may run
  // on another gRPC thread at once; posting first keeps the strand's order
  // the order the messages were read (a trainer's client sequences commit in
  // order, which resending after a reconnect relies on).
  if (!ok) {
    Post([](IngestReactor& r) {
      r.read_closed_ = true;
      r.MaybeFinishGracefully();
    });
    read_in_flight_.store(false);
    return;
  }
  In message;
  if (!grpc::SerializationTraits<In>::Deserialize(&in_buf_, &message).ok()) {
    service_->counters().undecodable.fetch_add(1);
    Post([](IngestReactor& r) {
      r.FinishNow(ToGrpc(absl::InvalidArgumentError(
          Cat("a message did not decode as ", In::descriptor()->full_name()))));
    });
    read_in_flight_.store(false);
    return;
  }
  read_ahead_.fetch_add(1);
  Post([message = std::move(message), arrival_mono](IngestReactor& r) mutable {
    r.read_ahead_.fetch_sub(1);
    r.HandleMessage(std::move(message), arrival_mono);
  });
  read_in_flight_.store(false);  // in_buf_ is free again
  // Read the next message right here, on the gRPC thread, while the strand
  // says there is room (MaybeRead opens the gate): reading no longer waits
  // for a hop to the strand and back per message, which is what kept one
  // pipelining stream far below the ledger's rate. A read the strand asked
  // for while this one was in flight is started here too.
  if ((read_ahead_open_.load() && read_ahead_.load() < kMaxReadAhead) || read_requested_.load()) {
    StartReadOnce();
  }
}

template <typename Side>
bool IngestReactor<Side>::StartReadOnce() {
  // No lock is held across StartRead (gRPC may run a reaction inline);
  // `issuing_` lets FinishNow wait until a read being started is started,
  // so no read is started after Finish.
  issuing_.fetch_add(1);
  bool started = false;
  if (!finish_called_.load() && !read_in_flight_.exchange(true)) {
    read_requested_.store(false);
    StartRead(&in_buf_);
    started = true;
  }
  issuing_.fetch_sub(1);
  return started;
}

template <typename Side>
void IngestReactor<Side>::OnWriteDone(bool ok) {
  Post([ok](IngestReactor& r) {
    r.writing_ = false;
    if (!ok) return;  // the stream is gone; OnDone follows
    r.WriteNext();
    r.MaybeRead();
    r.MaybeFinishGracefully();
  });
}

template <typename Side>
void IngestReactor<Side>::OnCancel() {
  Post([](IngestReactor& r) { r.FinishNow(grpc::Status::CANCELLED); });
}

template <typename Side>
void IngestReactor<Side>::OnDone() {
  Post([](IngestReactor& r) { r.Cleanup(); });
}

template <typename Side>
void IngestReactor<Side>::Cleanup() {
  if (udp_tag_ != 0) service_->options().probe_port.remove_stream(udp_tag_);
  if (admitted_) {
    service_->admission().Release(peer_host_);
    ops::StreamClosed(Side::kRole == v1::ROLE_AGENT ? ops::StreamRole::kAgent
                                                    : ops::StreamRole::kTrainer);
  }
  if (runtime_ && hello_done_) {
    runtime_->RemoveStream(this);
    if (runtime_->open()) {
      v1::Record r;
      r.set_written_session_ns(runtime_->Now().nanos());
      auto* e = r.mutable_client_event();
      *e->mutable_client() = client_;
      e->set_event(v1::ClientEvent::KIND_DISCONNECTED);
      e->set_detail(end_reason_);
      runtime_->AppendRecord(std::move(r)).IgnoreError();
    }
  }
  self_.reset();  // the closure running this still holds a reference
}

template <typename Side>
void IngestReactor<Side>::OnTick() {
  if (tick_posted_.load()) return;
  const bool hello_late = service_->limits_clock()->NowNanos() >= hello_deadline_.load();
  const bool due = service_->mono()->NowNanos() >= tick_due_mono_.load();
  if (!hello_late && !due) return;
  if (tick_posted_.exchange(true)) return;
  Post([](IngestReactor& r) {
    r.tick_posted_.store(false);
    r.Tick();
  });
}

template <typename Side>
void IngestReactor<Side>::Tick() {
  if (finished_) return;
  const auto& opt = service_->options();
  if (!hello_done_) {
    if (service_->limits_clock()->NowNanos() >= hello_deadline_.load()) {
      service_->counters().hello_timeouts.fetch_add(1);
      FinishNow(ToGrpc(
          absl::DeadlineExceededError(Cat("no hello within ", opt.hello_timeout.seconds(), " s"))));
    }
    return;
  }
  const int64_t now = service_->mono()->NowNanos();
  if (outstanding_probe_ && now - outstanding_since_mono_ > opt.probe_timeout.nanos()) {
    outstanding_probe_ = false;  // lost; a late reply still matches sent_probes_
  }
  if (!outstanding_probe_ && now >= next_probe_mono_) {
    // The schedule runs on time since the hello (probe_scheduler.h); a
    // probe sooner than the steady rate needs a token of the server's budget.
    const Duration at = Duration::Nanos(now - hello_mono_ns_);
    if (probes_.Admit(at, [this] { return service_->probe_budget().TryTake(); })) {
      v1::ServerMessage m;
      m.mutable_probe()->set_probe_id(++last_probe_id_);
      // t1 is stamped when the write starts (WriteNext).
      out_.push_back(std::move(m));
      outstanding_probe_ = true;
      outstanding_since_mono_ = now;
      probes_.Sent(at, model_.estimate());
      WriteNext();
    }
    next_probe_mono_ = hello_mono_ns_ + probes_.due().nanos();
  }
  if (!held_.empty() && !model_.ready() && now - hello_mono_ns_ >= opt.clock_wait.nanos()) {
    ReleaseHeld();
  }
  MaybeRead();  // after a rate-limit pause
  UpdateTickDue(/*from_tick=*/true);
}

// The earliest service-clock time at which Tick has something to do.
template <typename Side>
void IngestReactor<Side>::UpdateTickDue(bool from_tick) {
  if (finished_ || !hello_done_) {
    tick_due_mono_.store(kNever);
    return;
  }
  const auto& opt = service_->options();
  int64_t due = outstanding_probe_ ? outstanding_since_mono_ + opt.probe_timeout.nanos() + 1
                                   : next_probe_mono_;
  if (!held_.empty() && !model_.ready()) {
    due = std::min(due, hello_mono_ns_ + opt.clock_wait.nanos());
  }
  if (reads_paused_until_mono_ != 0) due = std::min(due, reads_paused_until_mono_);
  tick_due_mono_.store(due);
  // Arm a one-shot timer (ticker.h) for a new due time. A due time that
  // Tick could not clear (no probe budget, reads still held back by
  // in-flight acks) is looked at again kRetryTick later, as the old 10 ms
  // poll did, rather than spinning between the ticker and this strand.
  if (due == kNever) return;
  const int64_t now = service_->mono()->NowNanos();
  if (due == armed_due_mono_ && due > now) return;  // that timer is set already
  armed_due_mono_ = due;
  const int64_t at = from_tick && due <= now ? now + kRetryTick.nanos() : due;
  service_->ticker().WakeAt(this->weak_from_this(), service_->mono(), at);
}

template <typename Side>
void IngestReactor<Side>::HandleMessage(In message, int64_t arrival_mono) {
  if (finished_) return;
  if (!hello_done_) {
    if (!Side::IsHello(message)) {
      return FinishNow(
          ToGrpc(absl::InvalidArgumentError("the first message on a stream must be a hello")));
    }
    HandleHello(message.hello());
  } else if (Side::IsHello(message)) {
    FinishNow(ToGrpc(absl::InvalidArgumentError("a second hello on one stream")));
  } else if (Side::IsProbeReply(message)) {
    HandleProbeReply(message.probe_reply());
  } else if (Side::IsPayload(message)) {
    // Arrival on session time: now, less the time the message waited for
    // this strand.
    const int64_t waited = service_->mono()->NowNanos() - arrival_mono;
    const SessionTime arrival = runtime_->Now() - Duration::Nanos(waited > 0 ? waited : 0);
    if (!TakeRateToken()) {
      service_->rate_limiter().NoteLimited(principal_.session_id + "/" + client_.client_id());
      // Read this stream's next message a little later: a flooding client
      // then costs the server about one refusal per pause, not one per
      // message it can push, and other streams keep their share.
      reads_paused_until_mono_ = service_->mono()->NowNanos() + kRefusalPause.nanos();
      read_ahead_open_.store(false);
      UpdateTickDue();
      Reject(Side::Sequence(message),
             absl::ResourceExhaustedError(Cat(
                 "rate limit: slow down (", Side::kPayload, " per token and per stream, at most ",
                 Side::kRole == v1::ROLE_TRAINER ? service_->options().feedback_rate
                                                 : service_->options().step_rate,
                 "/s); not stored")));
    } else if (!model_.ready() && (!held_.empty() || arrival_mono - hello_mono_ns_ <
                                                         service_->options().clock_wait.nanos())) {
      // Map once the first probe is back (see the header comment).
      held_.push_back({std::move(message), arrival});
      UpdateTickDue();
    } else {
      HandlePayload(message, arrival);
    }
  } else {
    FinishNow(ToGrpc(absl::InvalidArgumentError("empty message")));
  }
  MaybeRead();
}

template <typename Side>
bool IngestReactor<Side>::TakeRateToken() {
  // The stream's own bucket first, so a stream over its limit does not use
  // up its token's allowance for the token's other streams.
  if (!stream_bucket_->TryTake()) return false;
  return token_bucket_->TryTake();
}

template <typename Side>
void IngestReactor<Side>::HandleHello(const v1::Hello& hello) {
  // Look-ups below read the ledger; they run here, on a worker thread with
  // no lock held, never on a gRPC or ledger thread.
  if (absl::Status s = CheckTokensAgree(hello.token(), metadata_secret_); !s.ok()) {
    return FinishNow(ToGrpc(s));
  }
  absl::StatusOr<Principal> who =
      service_->auth()->Authenticate(hello.token().empty() ? metadata_secret_ : hello.token());
  if (!who.ok()) return FinishNow(ToGrpc(who.status()));
  principal_ = *who;
  if (principal_.role != Side::kRole) {
    return FinishNow(ToGrpc(
        absl::PermissionDeniedError(Cat("this stream needs a ", Side::kName, " token; this one is ",
                                        v1::Role_Name(principal_.role)))));
  }
  auto runtime = service_->hub()->Get(principal_.session_id);
  if (!runtime.ok()) return FinishNow(ToGrpc(runtime.status()));
  if (!(*runtime)->open()) {
    return FinishNow(ToGrpc(
        absl::FailedPreconditionError(Cat("session ", principal_.session_id, " is closed"))));
  }
  if (absl::Status s = ValidateHello(hello); !s.ok()) return FinishNow(ToGrpc(s));
  runtime_ = *runtime;
  auto last = runtime_->LastClientSequence(hello.client_id());
  if (!last.ok()) return FinishNow(ToGrpc(last.status()));

  const LiveService::Options& opt = service_->options();
  const bool trainer = Side::kRole == v1::ROLE_TRAINER;
  const RateLimiter::Rate rate{trainer ? opt.feedback_rate : opt.step_rate,
                               trainer ? opt.feedback_burst : opt.step_burst};
  token_bucket_ = service_->rate_limiter().BucketOf(principal_.token_id, rate);
  stream_bucket_ = service_->rate_limiter().NewBucket(rate);

  client_.set_client_id(hello.client_id());
  client_.set_role(principal_.role);
  client_.set_subject(principal_.subject);
  client_.set_source_kind(hello.source_kind());
  client_.set_source_description(hello.source_description());
  client_.set_software(hello.software());
  token_id_ = principal_.token_id;
  hello_done_ = true;
  hello_deadline_.store(kNever);
  hello_mono_ns_ = service_->mono()->NowNanos();
  const SessionTime now = runtime_->Now();
  // Crude mapping until a probe returns: assumes the hello took no time.
  hello_offset_ = Duration::Nanos(hello.sent_client_ns()) - Duration::Nanos(now.nanos());
  probes_ = ProbeScheduler(service_->probe_schedule());
  probes_.Restart(Duration::Zero());
  next_probe_mono_ = hello_mono_ns_;
  runtime_->AddStream(this);
  if (!runtime_->open()) {  // closed between the check above and AddStream
    return FinishNow(ToGrpc(
        absl::FailedPreconditionError(Cat("session ", principal_.session_id, " is closed"))));
  }
  // Before anything this trainer sends can be credited.
  if (Side::kRole == v1::ROLE_TRAINER) MaybeApplyCalibration();

  v1::Record r;
  r.set_written_session_ns(now.nanos());
  auto* e = r.mutable_client_event();
  *e->mutable_client() = client_;
  e->set_event(v1::ClientEvent::KIND_CONNECTED);
  e->set_detail(peer_);
  runtime_->AppendRecord(std::move(r)).IgnoreError();

  v1::ServerMessage m;
  auto* w = m.mutable_welcome();
  w->set_session_id(principal_.session_id);
  w->set_role(principal_.role);
  w->set_subject(principal_.subject);
  w->set_last_client_sequence(*last);
  w->set_max_state_bytes(opt.limits.max_state_bytes);
  w->set_max_features(opt.limits.max_features);
  w->set_server_version(kVersion);
  w->set_contract_version(kContractVersion);
  OpenProbePort(w);
  {
    std::lock_guard<std::mutex> lock(clock_view_mu_);
    clock_view_.client = client_;
    clock_view_.hello_offset = hello_offset_;
    clock_view_.updated = now;
    clock_view_.udp_tag = udp_tag_;
  }
  out_.push_back(std::move(m));
  WriteNext();
  UpdateTickDue();
  TM_LOG(kInfo) << Side::kName << " '" << principal_.subject << "' connected to "
                << principal_.session_id << " as " << hello.client_id() << " from " << peer_;
}

// Registers this stream at the UDP probe port with a fresh tag and key. The
// key never repeats across streams: a reconnecting client gets new ones,
// and the old ones die with the old stream.
template <typename Side>
void IngestReactor<Side>::OpenProbePort(v1::Welcome* w) {
  const ProbePortHooks& port = service_->options().probe_port;
  if (port.port == 0 || !port.add_stream) return;
  uint64_t tag = 0;
  std::string key(32, '\0');
  auto* key_bytes = reinterpret_cast<unsigned char*>(key.data());
  if (RAND_bytes(reinterpret_cast<unsigned char*>(&tag), sizeof tag) != 1 ||
      RAND_bytes(key_bytes, static_cast<int>(key.size())) != 1) {
    TM_LOG(kWarning) << "no random bytes for a UDP probe key; stream probes only";
    return;
  }
  if (tag == 0) tag = 1;  // 0 means "none"
  std::weak_ptr<IngestReactor> weak = this->shared_from_this();
  std::shared_ptr<SessionRuntime> runtime = runtime_;
  port.add_stream(
      tag, key, [runtime] { return runtime->Now(); },
      [weak](uint64_t probe_id, const ProbeTimestamps& ts) {
        if (auto self = weak.lock()) {
          self->Post([probe_id, ts](IngestReactor& r) { r.HandleUdpSample(probe_id, ts); });
        }
      });
  udp_tag_ = tag;
  w->set_udp_probe_port(port.port);
  w->set_udp_probe_tag(tag);
  w->set_udp_probe_key(key);
}

template <typename Side>
void IngestReactor<Side>::HandleProbeReply(const v1::ProbeReply& reply) {
  const SessionTime t4 = runtime_->Now();
  auto sent = sent_probes_.find(reply.probe_id());
  v1::Record r;
  r.set_written_session_ns(t4.nanos());
  v1::Probe* p = r.mutable_probe();
  p->set_client_id(client_.client_id());
  p->set_probe_id(reply.probe_id());
  p->set_t2_client_ns(reply.t2_client_ns());
  p->set_t3_client_ns(reply.t3_client_ns());
  p->set_t4_session_ns(t4.nanos());
  if (sent == sent_probes_.end()) {
    p->set_t1_session_ns(reply.t1_session_ns());
    p->set_accepted(false);
    p->set_reject_reason("unknown probe id");
    runtime_->AppendRecord(std::move(r)).IgnoreError();
    NoteProbe(false, t4);
    return;
  }
  if (reply.probe_id() == last_probe_id_) {
    outstanding_probe_ = false;
    UpdateTickDue();
  }
  ProbeTimestamps ts;
  ts.t1 = sent->second;
  ts.t2 = ClientTime::FromNanos(reply.t2_client_ns());
  ts.t3 = ClientTime::FromNanos(reply.t3_client_ns());
  ts.t4 = t4;
  sent_probes_.erase(sent);
  AddProbe(ts, std::move(r));
}

// A probe the client started over the UDP probe port (server/net/).
template <typename Side>
void IngestReactor<Side>::HandleUdpSample(uint64_t probe_id, const ProbeTimestamps& ts) {
  if (finished_ || !hello_done_) return;
  v1::Record r;
  r.set_written_session_ns(ts.t4.nanos());
  v1::Probe* p = r.mutable_probe();
  p->set_client_id(client_.client_id());
  p->set_probe_id(probe_id);
  p->set_t2_client_ns(ts.t2.nanos());
  p->set_t3_client_ns(ts.t3.nanos());
  p->set_t4_session_ns(ts.t4.nanos());
  p->set_transport("udp");
  AddProbe(ts, std::move(r));
}

// Judges a complete probe, adds it to the model and writes the Probe record
// `r` (client id, id, T2–T4 already set) and the model update.
template <typename Side>
void IngestReactor<Side>::AddProbe(const ProbeTimestamps& ts, v1::Record r) {
  const SessionTime t4 = ts.t4;
  v1::Probe* p = r.mutable_probe();
  p->set_t1_session_ns(ts.t1.nanos());
  if (absl::Status s = ValidateProbeTimes(ts.t1, ts.t2.nanos(), ts.t3.nanos(), ts.t4); !s.ok()) {
    // Kept in the ledger with its reason; the model never sees it.
    p->set_accepted(false);
    p->set_reject_reason(std::string(s.message()));
    runtime_->AppendRecord(std::move(r)).IgnoreError();
    NoteProbe(false, t4);
    return;
  }
  const OnWire w = ComputeOnWire(ts);
  p->set_offset_ns(w.offset.nanos());
  p->set_delay_ns(w.delay.nanos());
  const bool was_ready = model_.ready();
  const ProbeVerdict verdict = model_.AddProbe(ts);
  const bool accepted = verdict == ProbeVerdict::kAccepted || verdict == ProbeVerdict::kClockJump;
  p->set_accepted(accepted);
  if (!accepted) p->set_reject_reason(ProbeVerdictName(verdict));
  runtime_->AppendRecord(std::move(r)).IgnoreError();
  NoteProbe(accepted, t4);
  if (!accepted) {  // kept in the ledger and counted there
    TM_LOG(kDebug) << "probe from " << client_.client_id()
                   << " rejected: " << ProbeVerdictName(verdict);
    return;
  }
  const ClockEstimate est = model_.estimate();
  v1::Record m;
  m.set_written_session_ns(t4.nanos());
  v1::ClockModelUpdate* u = m.mutable_clock_model();
  u->set_client_id(client_.client_id());
  u->set_offset_ns(est.offset.nanos());
  u->set_drift_ppm(est.drift_ppm);
  u->set_reference_client_ns(est.reference.nanos());
  u->set_uncertainty_ns(est.uncertainty.nanos());
  u->set_min_delay_ns(est.min_delay.nanos());
  u->set_samples(static_cast<uint32_t>(est.samples));
  u->set_drift_error_ppm(est.drift_error_ppm);
  u->set_asymmetry_ns(est.asymmetry.nanos());
  u->set_offset_scatter_ns(est.offset_scatter.nanos());
  u->set_drift_fitted(est.drift_fitted);
  if (verdict == ProbeVerdict::kClockJump) {
    u->set_reason(Cat("restart: client clock jumped (offset now ", w.offset.seconds(), " s)"));
    TM_LOG(kWarning) << "client " << client_.client_id() << " clock jumped; model restarted";
    // A new model: probe fast again, from now.
    probes_.Restart(Duration::Nanos(service_->mono()->NowNanos() - hello_mono_ns_));
    next_probe_mono_ = hello_mono_ns_ + probes_.due().nanos();
    UpdateTickDue();
  } else {
    u->set_reason("probe");
  }
  runtime_->AppendRecord(std::move(m)).IgnoreError();
  if (!was_ready) ReleaseHeld();
}

template <typename Side>
void IngestReactor<Side>::NoteProbe(bool accepted, SessionTime t4) {
  if (!accepted) {
    std::lock_guard<std::mutex> lock(clock_view_mu_);
    ++clock_view_.probes;
    ++clock_view_.rejected;
    return;
  }
  const ClockEstimate est = model_.estimate();
  // The uncertainty grows linearly with the distance from the reference
  // (ClockModel::UncertaintyAt); its slope, measured over one second.
  const Duration u0 = model_.UncertaintyAt(est.reference);
  const Duration u1 = model_.UncertaintyAt(est.reference + Duration::Seconds(1));
  std::lock_guard<std::mutex> lock(clock_view_mu_);
  ++clock_view_.probes;
  clock_view_.probed = true;
  clock_view_.estimate = est;
  clock_view_.reference = SessionTime::FromNanos(est.reference.nanos()) - est.offset;
  clock_view_.growth = static_cast<double>((u1 - u0).nanos()) * 1e-9;
  clock_view_.updated = t4;
}

template <typename Side>
std::optional<v1::ClientClock> IngestReactor<Side>::Clock(SessionTime now) const {
  ClockView v;
  {
    std::lock_guard<std::mutex> lock(clock_view_mu_);
    v = clock_view_;
  }
  if (v.client.client_id().empty()) return std::nullopt;  // no hello yet
  v1::ClientClock c;
  c.set_client_id(v.client.client_id());
  c.set_role(v.client.role());
  c.set_subject(v.client.subject());
  c.set_source_kind(v.client.source_kind());
  c.set_probed(v.probed);
  if (v.probed) {
    const double since_reference = static_cast<double>((now - v.reference).nanos());
    c.set_offset_ns((v.estimate.offset +
                     Duration::FromSeconds(since_reference * 1e-9 * v.estimate.drift_ppm * 1e-6))
                        .nanos());
    c.set_drift_ppm(v.estimate.drift_ppm);
    c.set_uncertainty_ns((v.estimate.uncertainty +
                          Duration::FromSeconds(std::abs(since_reference) * 1e-9 * v.growth))
                             .nanos());
  } else {
    c.set_offset_ns(v.hello_offset.nanos());
    c.set_uncertainty_ns(kHelloMappingUncertainty.nanos());
  }
  c.set_probes(v.probes);
  c.set_rejected_probes(v.rejected);
  const ProbePortHooks& port = service_->options().probe_port;
  if (v.udp_tag != 0 && port.drops) c.set_udp_probe_drops(port.drops(v.udp_tag));
  c.set_since_update_ns((now - v.updated).nanos());
  return c;
}

template <typename Side>
void IngestReactor<Side>::ReleaseHeld() {
  while (!held_.empty()) {
    Held h = std::move(held_.front());
    held_.pop_front();
    HandlePayload(h.message, h.arrival);
  }
  UpdateTickDue();
  MaybeFinishGracefully();
}

// The session time of a client reading, and its uncertainty.
template <typename Side>
std::pair<SessionTime, Duration> IngestReactor<Side>::Map(int64_t client_ns,
                                                          absl::Status* error) const {
  if (model_.ready()) {
    const ClientTime t = ClientTime::FromNanos(client_ns);
    return {model_.ToSession(t), model_.UncertaintyAt(t)};
  }
  auto mapped = MapThroughHelloOffset(client_ns, hello_offset_);
  if (!mapped.ok()) {
    *error = mapped.status();
    return {SessionTime(), kHelloMappingUncertainty};
  }
  return {*mapped, kHelloMappingUncertainty};
}

// The server's real-time/session pair is read between two session readings,
// so a preemption between the reads widens the bound (read_spread) rather
// than shifting the mapping unseen.
template <typename Side>
MappedEvent IngestReactor<Side>::MapEventTime(int64_t client_ns, const RealtimeReading& reading,
                                              Duration span, absl::Status* error) {
  MappedEvent m;
  std::tie(m.at, m.uncertainty) = Map(client_ns, error);
  m.round_trip_at = m.at;
  m.round_trip_uncertainty = m.uncertainty;
  m.decision.uncertainty = m.uncertainty;
  if (!error->ok()) return m;
  TimeSourceInputs in;
  in.enabled = service_->options().realtime_mapping;
  in.client = reading;
  in.round_trip_uncertainty = m.uncertainty;
  std::optional<SessionTime> through_realtime;
  if (in.enabled && reading.realtime_ns > 0 && reading.synced) {
    const DisciplineCache::Snapshot server = service_->discipline().Get();
    in.server = server.state;
    in.server_state_age = server.age;
    m.server_bound = server.state.max_error;
    const SessionTime before = runtime_->Now();
    const int64_t realtime_ns = service_->discipline().source()->RealtimeNanos();
    const SessionTime after = runtime_->Now();
    in.read_spread = (after - before) / 2;
    const SessionTime anchor = before + in.read_spread;
    through_realtime = RealtimeToSession(reading.realtime_ns, anchor, realtime_ns);
    if (through_realtime) {
      in.event_age = std::max(Abs(anchor - *through_realtime), Abs(anchor - m.at)) + Abs(span);
      in.disagreement = *through_realtime - m.at;
    }
  }
  m.decision = ChooseTimeSource(in);
  if (m.decision.source == TimeSourceChoice::kRealtime) {
    m.at = *through_realtime;
    m.uncertainty = m.decision.uncertainty;
  }
  return m;
}

template <typename Side>
void IngestReactor<Side>::Reject(uint64_t client_sequence, const absl::Status& s,
                                 bool calibration) {
  ops::CountIngest(calibration                     ? ops::IngestKind::kCalibrationEvent
                   : Side::kRole == v1::ROLE_AGENT ? ops::IngestKind::kStep
                                                   : ops::IngestKind::kFeedback,
                   static_cast<int>(s.code()));
  v1::ServerMessage m;
  v1::Ack* ack = m.mutable_ack();
  ack->set_client_sequence(client_sequence);
  ack->set_code(static_cast<int32_t>(s.code()));
  ack->set_message(std::string(s.message()));
  out_.push_back(std::move(m));
  WriteNext();
}

template <typename Side>
void IngestReactor<Side>::AppendClient(v1::Record record) {
  ++pending_acks_;
  auto sent = std::make_shared<const v1::Record>(record);
  std::weak_ptr<IngestReactor> weak = this->shared_from_this();
  // May run on the ledger thread or right here (a ledger failing fast):
  // either way it only posts.
  runtime_->AppendClientRecord(std::move(record), [weak, sent](const v1::Ack& ack) {
    if (auto self = weak.lock()) {
      self->Post([ack, sent](IngestReactor& r) { r.OnAck(ack, sent); });
    }
  });
}

template <typename Side>
void IngestReactor<Side>::OnAck(v1::Ack ack, std::shared_ptr<const v1::Record> sent) {
  // The ledger could not store it (disk full): a state the server leaves by
  // itself, so the client should keep the message and send it again later,
  // not drop it. UNAVAILABLE says exactly that ("retry the failing call");
  // RESOURCE_EXHAUSTED stays the answer to a client over its rate limit,
  // whose message is dropped on purpose.
  RetryableIfStoreFull(&ack);
  if (!ack.duplicate() || ack.code() != 0 || finished_) {
    NoteAck(ack, *sent, runtime_->Now());
    return DeliverAck(ack);
  }
  // A resend: the stored original must carry the same content. Read it on
  // the pool (a ledger read), then come back to the strand.
  std::weak_ptr<IngestReactor> weak = this->shared_from_this();
  ledger::Ledger* ledger = service_->hub()->ledger();
  const std::string session = principal_.session_id;
  service_->pool().Submit([weak, ledger, session, ack, sent]() mutable {
    auto stored = ledger->Read(session, ack.sequence(), 1);
    std::optional<std::string> mismatch;
    if (stored.ok() && !stored->empty() && stored->front().sequence() == ack.sequence()) {
      mismatch = DescribeContentMismatch(stored->front(), *sent);
    }
    if (mismatch) {
      ack.set_code(static_cast<int32_t>(absl::StatusCode::kAlreadyExists));
      ack.set_message(Cat("client_sequence ", ack.client_sequence(),
                          " was used before with different content: ", *mismatch,
                          "; the new message was not stored"));
    }
    if (auto self = weak.lock()) {
      if (mismatch) self->service_->counters().content_mismatches.fetch_add(1);
      self->Post([ack, sent](IngestReactor& r) {
        NoteAck(ack, *sent, r.runtime_->Now());
        r.DeliverAck(ack);
      });
    }
  });
}

template <typename Side>
void IngestReactor<Side>::DeliverAck(const v1::Ack& ack) {
  if (pending_acks_ > 0) --pending_acks_;
  if (finished_) return;
  v1::ServerMessage m;
  *m.mutable_ack() = ack;
  out_.push_back(std::move(m));
  WriteNext();
  MaybeRead();
}

template <typename Side>
void IngestReactor<Side>::WriteNext() {
  if (writing_ || finished_ || out_.empty()) return;
  current_ = std::move(out_.front());
  out_.pop_front();
  if (batch_acks_ && current_.has_ack() && !out_.empty() && out_.front().has_ack()) {
    // Acks that queued while the last write was in flight go out as one
    // AckBatch, in order (stream.proto): one write, one serialisation and
    // one OnWriteDone instead of one each. Only consecutive acks are merged,
    // so a Calibration still precedes its Ack.
    v1::ServerMessage batch;
    v1::AckBatch* acks = batch.mutable_ack_batch();
    acks->mutable_acks()->Add(std::move(*current_.mutable_ack()));
    while (!out_.empty() && out_.front().has_ack()) {
      acks->mutable_acks()->Add(std::move(*out_.front().mutable_ack()));
      out_.pop_front();
    }
    current_ = std::move(batch);
  }
  if (current_.has_probe()) {
    // T1 as late as possible: the moment the probe goes to the transport.
    const SessionTime t1 = runtime_->Now();
    current_.mutable_probe()->set_t1_session_ns(t1.nanos());
    sent_probes_[current_.probe().probe_id()] = t1;
    while (sent_probes_.size() > kRememberedProbes) sent_probes_.erase(sent_probes_.begin());
  }
  bool own_buffer = false;
  out_buf_.Clear();  // the last write is done with it; Serialize needs it empty
  if (!grpc::SerializationTraits<v1::ServerMessage>::Serialize(current_, &out_buf_, &own_buffer)
           .ok()) {
    return FinishNow(ToGrpc(absl::InternalError("cannot serialise a reply")));
  }
  writing_ = true;
  StartWrite(&out_buf_);
}

// Reads the next message unless the stream has too much in flight: then
// it waits for acks to drain (fairness between streams; see Options).
template <typename Side>
void IngestReactor<Side>::MaybeRead() {
  // The read-ahead gate (OnReadDone) stays open only while a few more
  // messages fit under the in-flight cap, so the cap holds to within
  // kMaxReadAhead messages.
  const size_t in_flight = pending_acks_ + out_.size();
  const size_t cap = service_->options().max_in_flight_per_stream;
  const bool room = !finished_ && !read_closed_ && hello_done_ && in_flight < cap;
  if (!room) {
    read_ahead_open_.store(false);
    return;
  }
  if (reads_paused_until_mono_ != 0) {
    read_ahead_open_.store(false);
    if (service_->mono()->NowNanos() < reads_paused_until_mono_) return;  // Tick resumes
    reads_paused_until_mono_ = 0;
  }
  read_ahead_open_.store(in_flight + static_cast<size_t>(kMaxReadAhead) < cap);
  read_requested_.store(true);  // taken by OnReadDone if a read is still in flight
  StartReadOnce();
}

template <typename Side>
void IngestReactor<Side>::MaybeFinishGracefully() {
  if (read_closed_ && pending_acks_ == 0 && held_.empty() && out_.empty() && !writing_) {
    FinishNow(grpc::Status::OK);
  }
}

template <typename Side>
void IngestReactor<Side>::FinishNow(const grpc::Status& status) {
  if (finished_) return;
  finished_ = true;
  read_ahead_open_.store(false);
  finish_called_.store(true);  // no StartRead after Finish (StartReadOnce)
  while (issuing_.load() != 0) std::this_thread::yield();
  tick_due_mono_.store(kNever);
  hello_deadline_.store(kNever);
  end_reason_ = status.ok() ? "closed by client" : status.error_message();
  if (!status.ok() && status.error_code() != grpc::StatusCode::CANCELLED) {
    TM_LOG(kInfo) << Side::kName << " stream ended: " << status.error_message();
  }
  // Another instance owns the session: say where, so the client reconnects
  // there (docs/architecture.md, "More than one machine").
  if (status.error_code() == grpc::StatusCode::UNAVAILABLE && !principal_.session_id.empty()) {
    const std::string owner = service_->hub()->OwnerHint(principal_.session_id);
    if (!owner.empty()) ctx_->AddTrailingMetadata(kOwnerMetadata, owner);
  }
  Finish(status);
}

template <typename Side>
void IngestReactor<Side>::MaybeApplyCalibration() {
  if (runtime_->pin_kernels() || runtime_->HasKernelFor(principal_.subject)) return;
  ledger::Ledger* ledger = service_->hub()->ledger();
  auto latest = ledger->LatestCalibration(principal_.subject);
  if (!latest.ok()) {
    TM_LOG(kWarning) << "trainer '" << principal_.subject
                     << "': calibration look-up failed: " << latest.status().message();
    return;
  }
  if (!latest->has_value()) return;
  const v1::Calibration& c = (*latest)->calibration();
  if (!KernelFromProto(c.kernel()).ok()) {
    TM_LOG(kWarning) << "calibration " << c.id() << " holds no usable kernel; not applied";
    return;
  }
  // Once per trainer per session, even with several streams saying hello.
  if (!runtime_->ClaimAutoKernel(principal_.subject)) return;
  v1::Record r;
  r.set_written_session_ns(runtime_->Now().nanos());
  v1::KernelSetting* ks = r.mutable_kernel();
  ks->set_trainer(principal_.subject);
  *ks->mutable_kernel() = c.kernel();
  ks->set_weight(1.0);
  ks->set_description(c.kernel_description());
  ks->set_author("calibration");
  ks->set_calibration(c.id());
  runtime_->AppendRecord(std::move(r)).IgnoreError();
  TM_LOG(kInfo) << "trainer '" << principal_.subject << "' in " << principal_.session_id
                << ": kernel " << c.kernel_description() << " from calibration " << c.id();
}

template <typename Side>
void IngestReactor<Side>::HandleCalibration(const v1::CalibrationMessage& m, SessionTime arrival) {
  const LiveService::Options& opt = service_->options();
  const uint64_t cseq = m.client_sequence();
  if (absl::Status s = ValidateCalibration(m); !s.ok())
    return Reject(cseq, s, /*calibration=*/true);
  if (m.has_finish()) return StartCalibrationFinish(m);
  const bool move = m.has_move();
  const int64_t at = move ? m.move().shown_source_ns() : m.answer().event_source_ns();
  // Mapped exactly like a feedback's event time.
  absl::Status map_error;
  auto [mapped, mapped_uncertainty] = Map(at, &map_error);
  if (!map_error.ok()) return Reject(cseq, map_error, /*calibration=*/true);
  const EventTimeVerdict v = JudgeEventTime(mapped, mapped_uncertainty, arrival, model_.ready(),
                                            opt.event_future_tolerance, opt.limits);
  if (!v.status.ok()) return Reject(cseq, v.status, /*calibration=*/true);
  v1::Record r;
  r.set_written_session_ns(arrival.nanos());
  v1::CalibrationEvent* e = r.mutable_calibration_event();
  e->set_client_id(client_.client_id());
  e->set_client_sequence(cseq);
  e->set_trainer(principal_.subject);
  e->set_run(m.run());
  if (move) {
    e->set_kind(v1::CalibrationEvent::KIND_MOVE);
    e->set_move(m.move().move());
    e->set_approve(m.move().approve());
    e->set_practice(m.move().practice());
    e->set_detail(m.move().detail());
  } else {
    e->set_kind(v1::CalibrationEvent::KIND_ANSWER);
    e->set_approve(m.answer().approve());
    e->set_detail(m.answer().input());
  }
  e->set_at_source_ns(at);
  e->set_at_session_ns(v.event.nanos());
  e->set_uncertainty_ns(v.uncertainty.nanos());
  e->set_arrival_session_ns(arrival.nanos());
  AppendClient(std::move(r));
}

// A sync pulse's edge is mapped like a calibration event's time: through the
// round-trip model (a pulse is shared with another recorder, so the route
// must be the one every pulse of the client takes); its source bracket is
// added to the uncertainty.
template <typename Side>
void IngestReactor<Side>::HandleSyncPulse(const v1::SyncPulseMessage& m, SessionTime arrival) {
  const LiveService::Options& opt = service_->options();
  const uint64_t cseq = m.client_sequence();
  if (absl::Status s = ValidateSyncPulse(m); !s.ok()) return Reject(cseq, s);
  absl::Status map_error;
  auto [mapped, mapped_uncertainty] = Map(m.event_source_ns(), &map_error);
  if (!map_error.ok()) return Reject(cseq, map_error);
  const Duration bracket = Duration::Nanos(m.source_uncertainty_ns());
  const EventTimeVerdict v = JudgeEventTime(mapped, mapped_uncertainty + bracket, arrival,
                                            model_.ready(), opt.event_future_tolerance, opt.limits);
  if (!v.status.ok()) return Reject(cseq, v.status);
  v1::Record r;
  r.set_written_session_ns(arrival.nanos());
  v1::SyncPulse* p = r.mutable_sync_pulse();
  p->set_client_id(client_.client_id());
  p->set_client_sequence(cseq);
  p->set_trainer(principal_.subject);
  p->set_direction(m.direction());
  p->set_line(m.line());
  p->set_level(m.level());
  p->set_event_source_ns(m.event_source_ns());
  p->set_source_uncertainty_ns(m.source_uncertainty_ns());
  p->set_event_session_ns(v.event.nanos());
  p->set_uncertainty_ns(v.uncertainty.nanos());
  p->set_arrival_session_ns(arrival.nanos());
  p->set_reason(m.reason());
  p->set_pulse_index(m.pulse_index());
  p->set_marker_sequence(m.marker_sequence());
  p->set_device(m.device());
  p->set_simulated(m.simulated());
  AppendClient(std::move(r));
}

namespace {

// The pool half of a calibration finish (see StartCalibrationFinish).
// `answer` posts the result back to the stream.
using CalibrationAnswerFn = std::function<void(std::optional<v1::Calibration>, v1::Ack)>;

// A finish whose client key is stored at `sequence` already: the same
// calibration again, or ALREADY_EXISTS if that key holds something else.
void AnswerStoredCalibration(ledger::Ledger* ledger, const std::string& session,
                             const CalibrationRequest& req, uint64_t sequence,
                             const CalibrationAnswerFn& answer) {
  auto stored = ledger->Read(session, sequence, 1);
  if (!stored.ok()) return answer(std::nullopt, ErrorAck(req.client_sequence, stored.status()));
  if (stored->empty() || !stored->front().has_calibration() ||
      stored->front().calibration().run() != req.run) {
    return answer(std::nullopt,
                  ErrorAck(req.client_sequence,
                           absl::AlreadyExistsError(Cat(
                               "client_sequence ", req.client_sequence,
                               " was used before with different content (not the finish of run '",
                               req.run, "'); the new message was not stored"))));
  }
  v1::Ack ack;
  ack.set_client_sequence(req.client_sequence);
  ack.set_sequence(sequence);
  ack.set_duplicate(true);
  ack.set_message("duplicate: already stored");
  answer(stored->front().calibration(), ack);
}

}  // namespace

template <typename Side>
void IngestReactor<Side>::StartCalibrationFinish(const v1::CalibrationMessage& m) {
  ++pending_acks_;
  CalibrationRequest req;
  req.trainer = principal_.subject;
  req.client_id = client_.client_id();
  req.client_sequence = m.client_sequence();
  req.run = m.run();
  req.source_kind = client_.source_kind();
  req.source_description = client_.source_description();
  req.min_answers = m.finish().min_answers();
  req.display_note = m.finish().display_note();
  req.bootstrap_resamples = service_->options().calibration_resamples;
  std::weak_ptr<IngestReactor> weak = this->shared_from_this();
  const std::string session = principal_.session_id;
  std::shared_ptr<SessionRuntime> runtime = runtime_;
  ledger::Ledger* ledger = service_->hub()->ledger();
  CalibrationAnswerFn answer = [weak](std::optional<v1::Calibration> c, v1::Ack ack) {
    if (auto self = weak.lock()) {
      self->Post([c = std::move(c), ack = std::move(ack)](IngestReactor& r) mutable {
        r.DeliverCalibration(std::move(c), std::move(ack));
      });
    }
  };
  // Runs on the fit pool: ledger reads and the fit (a bootstrap of 1000
  // refits, seconds for the ex-Gaussian) never run on a gRPC thread, the
  // ledger thread, this strand or the workers other streams share.
  auto work = [weak, session, runtime, ledger, req, answer]() mutable {
    const uint64_t cseq = req.client_sequence;
    auto found = ledger->FindClientSequence(session, req.client_id, cseq);
    if (!found.ok()) return answer(std::nullopt, ErrorAck(cseq, found.status()));
    if (found->has_value()) return AnswerStoredCalibration(ledger, session, req, **found, answer);
    auto events = ledger->ReadCalibrationEvents(session, req.client_id, req.run);
    if (!events.ok()) return answer(std::nullopt, ErrorAck(cseq, events.status()));
    auto hex = RandomHex(4);
    if (!hex.ok()) return answer(std::nullopt, ErrorAck(cseq, hex.status()));
    req.id = "c-" + *hex;
    const auto fit_start = std::chrono::steady_clock::now();
    auto built = BuildCalibration(*events, req);
    const auto fit_ms = std::chrono::duration_cast<std::chrono::milliseconds>(
                            std::chrono::steady_clock::now() - fit_start)
                            .count();
    if (!built.ok()) return answer(std::nullopt, ErrorAck(cseq, built.status()));
    TM_LOG(kInfo) << "calibration " << built->id() << " of trainer '" << req.trainer << "' (run "
                  << req.run << "): " << built->valid() << " valid answers, kernel "
                  << built->kernel_description() << "; matched and fitted in " << fit_ms << " ms";
    v1::Record r;
    r.set_written_session_ns(runtime->Now().nanos());
    *r.mutable_calibration() = *built;
    auto calibration = std::make_shared<const v1::Calibration>(*std::move(built));
    runtime->AppendClientRecord(
        std::move(r), [weak, session, ledger, req, answer, calibration](const v1::Ack& ack) {
          if (ack.code() != 0) return answer(std::nullopt, ack);
          if (!ack.duplicate()) return answer(*calibration, ack);
          // A copy of this finish (another stream) was stored first: send that.
          if (auto self = weak.lock()) {
            self->service_->pool().Submit([session, ledger, req, answer, seq = ack.sequence()] {
              AnswerStoredCalibration(ledger, session, req, seq, answer);
            });
          }
        });
  };
  // The run's moves and answers were appended before this finish (same
  // stream, in order): once the barrier passes they are committed and
  // readable. The barrier runs on the ledger thread, so it only submits.
  ledger->Barrier([weak, work = std::move(work)]() mutable {
    if (auto self = weak.lock()) self->service_->fit_pool().Submit(std::move(work));
  });
}

template <typename Side>
void IngestReactor<Side>::DeliverCalibration(std::optional<v1::Calibration> calibration,
                                             v1::Ack ack) {
  RetryableIfStoreFull(&ack);
  if (calibration && ack.code() == 0 && !finished_) {
    v1::ServerMessage m;
    *m.mutable_calibration() = *std::move(calibration);
    out_.push_back(std::move(m));
  }
  DeliverAck(ack);  // after the calibration: the proto promises that order
}

template <>
void IngestReactor<TrainerSide>::HandlePayload(const In& message, SessionTime arrival) {
  if (message.has_calibration()) return HandleCalibration(message.calibration(), arrival);
  if (message.has_sync_pulse()) return HandleSyncPulse(message.sync_pulse(), arrival);
  const v1::FeedbackMessage& f = message.feedback();
  const LiveService::Options& opt = service_->options();
  if (absl::Status s = ValidateFeedback(f, opt.limits); !s.ok()) {
    return Reject(f.client_sequence(), s);
  }
  absl::Status map_error;
  const RealtimeReading reading{f.event_realtime_ns(), Duration::Nanos(f.realtime_bound_ns()),
                                f.realtime_synced()};
  MappedEvent mapped = MapEventTime(f.event_source_ns(), reading, Duration::Zero(), &map_error);
  if (!map_error.ok()) return Reject(f.client_sequence(), map_error);
  auto judge = [&](const MappedEvent& m) {
    // A real-time mapping is as firm as a probed model: no clamping.
    return JudgeEventTime(m.at, m.uncertainty, arrival, model_.ready() || ThroughRealtime(m),
                          opt.event_future_tolerance, opt.limits);
  };
  EventTimeVerdict v = judge(mapped);
  if (!v.status.ok() && ThroughRealtime(mapped)) {
    mapped = AsRoundTrip(mapped);
    v = judge(mapped);
  }
  if (!v.status.ok()) {
    if (v.status.code() == absl::StatusCode::kOutOfRange) {
      service_->counters().future_events.fetch_add(1);
    }
    return Reject(f.client_sequence(), v.status);
  }
  if (v.clamped) service_->counters().clamped_events.fetch_add(1);
  v1::Record r;
  r.set_written_session_ns(arrival.nanos());
  v1::Feedback* fb = r.mutable_feedback();
  fb->set_client_id(client_.client_id());
  fb->set_client_sequence(f.client_sequence());
  fb->set_trainer(principal_.subject);
  fb->set_value(f.value());
  fb->set_event_source_ns(f.event_source_ns());
  fb->set_arrival_session_ns(arrival.nanos());
  fb->set_event_session_ns(v.event.nanos());
  fb->set_uncertainty_ns(v.uncertainty.nanos());
  fb->set_event_clamped(v.clamped);
  fb->set_input(f.input());
  SetTimeSource(fb, mapped, reading);
  fb->set_event_realtime_ns(f.event_realtime_ns());
  fb->set_audio_sha256(f.audio_sha256());
  // Kept either way; a late one may find its steps already settled.
  fb->set_late(arrival - v.event > runtime_->allowed_lateness());
  AppendClient(std::move(r));
}

template <>
void IngestReactor<AgentSide>::HandlePayload(const In& message, SessionTime arrival) {
  const v1::StepMessage& s = message.step();
  const Limits& limits = service_->options().limits;
  const uint64_t cseq = s.client_sequence();
  if (absl::Status st = ValidateStep(s, limits); !st.ok()) return Reject(cseq, st);
  if (s.start_agent_ns() <= last_step_start_ns_) {
    return Reject(cseq, absl::InvalidArgumentError(
                            "a step must start after the previous step of this agent"));
  }
  absl::Status map_error;
  const RealtimeReading reading{s.start_realtime_ns(), Duration::Nanos(s.realtime_bound_ns()),
                                s.realtime_synced()};
  // Both positive and ordered (ValidateStep), so the difference fits.
  const Duration length =
      s.end_agent_ns() != 0 ? Duration::Nanos(s.end_agent_ns() - s.start_agent_ns()) : Duration();
  MappedEvent mapped = MapEventTime(s.start_agent_ns(), reading, length, &map_error);
  if (!map_error.ok()) return Reject(cseq, map_error);
  const bool same_instant = s.start_agent_ns() == last_step_end_agent_ns_;
  // Where the step lands through `m`'s route.
  struct Placed {
    SessionTime start;
    SessionTime end;  // when the step has one
    Duration uncertainty;
    std::string moved;  // the order guard's note, if it moved the step
  };
  auto place = [&](const MappedEvent& m, absl::Status* error) {
    const bool realtime = ThroughRealtime(m);
    Placed p{m.at, SessionTime(), m.uncertainty, ""};
    if (same_instant && !realtime && !last_step_realtime_) {
      p.start = last_step_end_session_;  // the same instant maps to the same time
    }
    if (s.end_agent_ns() != 0) {
      if (realtime) {
        // The agent's clock and its CLOCK_REALTIME advance together (both
        // slewed alike by the kernel; clock_gettime(2)), so the end is the
        // start plus the step's length.
        p.end = p.start + length;
      } else {
        p.end = Map(s.end_agent_ns(), error).first;
      }
    }
    // Step order when real time is involved (this step's mapping or the
    // last one's): the two routes err differently, so a step could land
    // before the end of the step before it. The whole step is moved to that
    // end (to it exactly when it starts at the same agent instant). Between
    // two real-time steps that is only the read jitter of one instant, as
    // between two round-trip steps; across a change of route, or past an
    // earlier end, the uncertainty is widened by the move, so the stated
    // interval still covers where the step was mapped, and the reason says so.
    if (last_step_start_ns_ != 0 && (realtime || last_step_realtime_)) {
      const SessionTime target =
          same_instant ? last_step_end_session_ : std::max(p.start, last_step_floor_);
      const Duration shift = target - p.start;
      if (shift != Duration::Zero()) {
        p.start = p.start + shift;
        if (s.end_agent_ns() != 0) p.end = p.end + shift;
        if (!same_instant || realtime != last_step_realtime_) {
          p.uncertainty = p.uncertainty + Abs(shift);
          p.moved = Cat("; moved ", shift.nanos(), " ns to keep step order");
        }
      }
    }
    return p;
  };
  Placed placed = place(mapped, &map_error);
  if (!map_error.ok()) return Reject(cseq, map_error);
  absl::Status plausible = CheckStepTime(placed.start, placed.uncertainty, arrival, limits);
  if (!plausible.ok() && ThroughRealtime(mapped)) {
    mapped = AsRoundTrip(mapped);
    placed = place(mapped, &map_error);
    if (!map_error.ok()) return Reject(cseq, map_error);
    plausible = CheckStepTime(placed.start, placed.uncertainty, arrival, limits);
  }
  if (!plausible.ok()) return Reject(cseq, plausible);
  const bool realtime = ThroughRealtime(mapped);
  const SessionTime start = placed.start;
  const SessionTime end = placed.end;
  const Duration uncertainty = placed.uncertainty;
  last_step_start_ns_ = s.start_agent_ns();
  last_step_floor_ = s.end_agent_ns() != 0 ? end : start;
  last_step_realtime_ = realtime;
  v1::Record r;
  r.set_written_session_ns(arrival.nanos());
  v1::Step* step = r.mutable_step();
  step->set_client_id(client_.client_id());
  step->set_client_sequence(cseq);
  step->set_agent(principal_.subject);
  step->set_step_id(s.step_id());
  step->set_episode(s.episode());
  step->set_start_agent_ns(s.start_agent_ns());
  step->set_end_agent_ns(s.end_agent_ns());
  step->set_start_session_ns(start.nanos());
  SessionTime last_known = start;
  if (s.end_agent_ns() != 0) {
    last_known = end;
    step->set_end_session_ns(end.nanos());
    last_step_end_agent_ns_ = s.end_agent_ns();
    last_step_end_session_ = end;
  }
  step->set_late(arrival - last_known > runtime_->allowed_lateness());
  step->set_arrival_session_ns(arrival.nanos());
  step->set_uncertainty_ns(uncertainty.nanos());
  step->set_action(s.action());
  step->set_state(s.state());
  *step->mutable_features() = s.features();
  SetTimeSource(step, mapped, reading);
  step->set_start_realtime_ns(s.start_realtime_ns());
  if (!placed.moved.empty()) {
    step->set_time_source_reason(step->time_source_reason() + placed.moved);
  }
  AppendClient(std::move(r));
}

template class IngestReactor<TrainerSide>;
template class IngestReactor<AgentSide>;

}  // namespace tickmark::rpc

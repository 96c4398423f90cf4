#include "server/rpc/live_service.h"

#include <cmath>
#include <deque>
#include <map>

#include <openssl/rand.h>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/rpc/admin_service.h"
#include "server/rpc/status.h"

namespace tickmark::rpc {
namespace {

namespace v1 = tickmark::v1;

// Uncertainty stated for a time mapped before any probe came back: the
// hello's one-way delay is unknown, so only a generous bound can be given.
constexpr Duration kHelloMappingUncertainty = Duration::Seconds(1);
// How many sent probes are remembered for matching late replies.
constexpr size_t kRememberedProbes = 16;

grpc::Status Error(grpc::StatusCode code, const std::string& message) {
  return grpc::Status(code, message);
}

// What differs between the trainer and the agent stream.
struct TrainerSide {
  using In = v1::TrainerMessage;
  static constexpr v1::Role kRole = v1::ROLE_TRAINER;
  static constexpr const char* kName = "trainer";
  static bool IsHello(const In& m) { return m.has_hello(); }
  static bool IsProbeReply(const In& m) { return m.has_probe_reply(); }
  static bool IsPayload(const In& m) { return m.has_feedback(); }
};

struct AgentSide {
  using In = v1::AgentMessage;
  static constexpr v1::Role kRole = v1::ROLE_AGENT;
  static constexpr const char* kName = "agent";
  static bool IsHello(const In& m) { return m.has_hello(); }
  static bool IsProbeReply(const In& m) { return m.has_probe_reply(); }
  static bool IsPayload(const In& m) { return m.has_step(); }
};

// One trainer or agent stream. Owns itself through self_ until OnDone, and
// is kept alive past that by commit callbacks that still hold a reference.
template <typename Side>
class IngestReactor final : public grpc::ServerBidiReactor<typename Side::In, v1::ServerMessage>,
                            public StreamHandle,
                            public Tickable,
                            public std::enable_shared_from_this<IngestReactor<Side>> {
  using In = typename Side::In;

 public:
  IngestReactor(LiveService* service, grpc::CallbackServerContext* ctx)
      : service_(service), ctx_(ctx), model_(service->options().clock) {}

  void Start() {
    self_ = this->shared_from_this();
    service_->Register(self_);
    this->StartRead(&in_);
  }

  const std::string& token_id() const override { return principal_.token_id; }

  void End(const grpc::Status& status) override {
    std::lock_guard<std::mutex> lock(mu_);
    FinishLocked(status);
  }

  void OnReadDone(bool ok) override {
    const int64_t arrival_mono = service_->mono()->NowNanos();
    std::lock_guard<std::mutex> lock(mu_);
    if (!ok) {
      read_closed_ = true;
      MaybeFinishGracefullyLocked();
      return;
    }
    if (finished_) return;
    if (!hello_done_) {
      HandleHelloLocked();
    } else if (Side::IsHello(in_)) {
      FinishLocked(Error(grpc::StatusCode::INVALID_ARGUMENT, "a second hello on one stream"));
    } else if (Side::IsProbeReply(in_)) {
      HandleProbeReplyLocked(in_.probe_reply());
    } else if (Side::IsPayload(in_)) {
      if (!model_.ready() && (held_.size() > 0 || arrival_mono - hello_mono_ns_ <
                                                     service_->options().clock_wait.nanos())) {
        // Map once the first probe is back (see the header comment).
        held_.push_back({in_, runtime_->Now()});
      } else {
        HandlePayloadLocked(in_, runtime_->Now());
      }
    } else {
      FinishLocked(Error(grpc::StatusCode::INVALID_ARGUMENT, "empty message"));
    }
    if (!finished_) this->StartRead(&in_);
  }

  void OnWriteDone(bool ok) override {
    std::lock_guard<std::mutex> lock(mu_);
    writing_ = false;
    if (!ok) return;  // the stream is gone; OnDone follows
    WriteNextLocked();
    MaybeFinishGracefullyLocked();
  }

  void OnCancel() override {
    std::lock_guard<std::mutex> lock(mu_);
    FinishLocked(grpc::Status::CANCELLED);
  }

  void OnDone() override {
    std::shared_ptr<SessionRuntime> runtime;
    {
      std::lock_guard<std::mutex> lock(mu_);
      runtime = runtime_;
    }
    service_->Unregister(this);
    if (udp_tag_ != 0) service_->options().probe_port.remove_stream(udp_tag_);
    if (runtime && hello_done_) {
      runtime->RemoveStream(this);
      if (runtime->open()) {
        v1::Record r;
        r.set_written_session_ns(runtime->Now().nanos());
        auto* e = r.mutable_client_event();
        *e->mutable_client() = client_;
        e->set_event(v1::ClientEvent::KIND_DISCONNECTED);
        e->set_detail(end_reason_);
        runtime->AppendRecord(std::move(r)).IgnoreError();
      }
    }
    self_.reset();  // may delete this
  }

  void OnTick() override {
    std::lock_guard<std::mutex> lock(mu_);
    if (finished_ || !hello_done_) return;
    const int64_t now = service_->mono()->NowNanos();
    const auto& opt = service_->options();
    if (outstanding_probe_ && now - outstanding_since_mono_ > opt.probe_timeout.nanos()) {
      outstanding_probe_ = false;  // lost; a late reply still matches sent_probes_
    }
    if (!outstanding_probe_ && now >= next_probe_mono_) {
      v1::ServerMessage m;
      m.mutable_probe()->set_probe_id(++last_probe_id_);
      // t1 is stamped when the write starts (WriteNextLocked).
      out_.push_back(std::move(m));
      outstanding_probe_ = true;
      outstanding_since_mono_ = now;
      const Duration gap = burst_left_ > 0 ? opt.probe_burst_spacing : opt.probe_interval;
      if (burst_left_ > 0) --burst_left_;
      next_probe_mono_ = now + gap.nanos();
      WriteNextLocked();
    }
    if (!held_.empty() && !model_.ready() && now - hello_mono_ns_ >= opt.clock_wait.nanos()) {
      ReleaseHeldLocked();
    }
  }

 private:
  struct Held {
    In message;
    SessionTime arrival;
  };

  void HandleHelloLocked() {
    if (!Side::IsHello(in_)) {
      return FinishLocked(Error(grpc::StatusCode::INVALID_ARGUMENT,
                                "the first message on a stream must be a hello"));
    }
    const v1::Hello& hello = in_.hello();
    absl::StatusOr<Principal> who =
        hello.token().empty() ? AuthenticateContext(*ctx_, *service_->auth())
                              : service_->auth()->Authenticate(hello.token());
    if (!who.ok()) return FinishLocked(ToGrpc(who.status()));
    principal_ = *who;
    if (principal_.role != Side::kRole) {
      return FinishLocked(Error(grpc::StatusCode::PERMISSION_DENIED,
                                Cat("this stream needs a ", Side::kName, " token; this one is ",
                                    v1::Role_Name(principal_.role))));
    }
    auto runtime = service_->hub()->Get(principal_.session_id);
    if (!runtime.ok()) return FinishLocked(ToGrpc(runtime.status()));
    if (!(*runtime)->open()) {
      return FinishLocked(Error(grpc::StatusCode::FAILED_PRECONDITION,
                                "session " + principal_.session_id + " is closed"));
    }
    if (!IsValidName(hello.client_id())) {
      return FinishLocked(Error(grpc::StatusCode::INVALID_ARGUMENT,
                                "client_id must be 1-64 characters of [A-Za-z0-9._:-]"));
    }
    if (hello.source_description().size() > 256 || hello.software().size() > 128) {
      return FinishLocked(Error(grpc::StatusCode::INVALID_ARGUMENT,
                                "source_description (256) or software (128) too long"));
    }
    runtime_ = *runtime;
    auto last = runtime_->LastClientSequence(hello.client_id());
    if (!last.ok()) return FinishLocked(ToGrpc(last.status()));

    client_.set_client_id(hello.client_id());
    client_.set_role(principal_.role);
    client_.set_subject(principal_.subject);
    client_.set_source_kind(hello.source_kind());
    client_.set_source_description(hello.source_description());
    client_.set_software(hello.software());
    hello_done_ = true;
    hello_mono_ns_ = service_->mono()->NowNanos();
    const SessionTime now = runtime_->Now();
    // Crude mapping until a probe returns: assumes the hello took no time.
    hello_offset_ = Duration::Nanos(hello.sent_client_ns()) - Duration::Nanos(now.nanos());
    burst_left_ = service_->options().probe_burst;
    next_probe_mono_ = hello_mono_ns_;
    runtime_->AddStream(this);

    v1::Record r;
    r.set_written_session_ns(now.nanos());
    auto* e = r.mutable_client_event();
    *e->mutable_client() = client_;
    e->set_event(v1::ClientEvent::KIND_CONNECTED);
    e->set_detail(ctx_->peer());
    runtime_->AppendRecord(std::move(r)).IgnoreError();

    v1::ServerMessage m;
    auto* w = m.mutable_welcome();
    w->set_session_id(principal_.session_id);
    w->set_role(principal_.role);
    w->set_subject(principal_.subject);
    w->set_last_client_sequence(*last);
    w->set_max_state_bytes(service_->options().limits.max_state_bytes);
    w->set_max_features(service_->options().limits.max_features);
    OpenProbePortLocked(w);
    out_.push_back(std::move(m));
    WriteNextLocked();
    TM_LOG(kInfo) << Side::kName << " '" << principal_.subject << "' connected to "
                  << principal_.session_id << " as " << hello.client_id() << " from "
                  << ctx_->peer();
  }

  void HandleProbeReplyLocked(const v1::ProbeReply& reply) {
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
      return;
    }
    if (reply.probe_id() == last_probe_id_) outstanding_probe_ = false;
    ProbeTimestamps ts{sent->second, ClientTime::FromNanos(reply.t2_client_ns()),
                       ClientTime::FromNanos(reply.t3_client_ns()), t4};
    sent_probes_.erase(sent);
    AddProbeLocked(ts, std::move(r));
  }

  // Admits this stream to the probe port, if there is one, and tells the
  // client in the Welcome. A fresh tag and key per stream: a reconnect gets
  // new ones, and the old ones die with the old stream.
  void OpenProbePortLocked(v1::Welcome* w) {
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
          auto self = weak.lock();
          if (!self) return;
          std::lock_guard<std::mutex> lock(self->mu_);
          self->HandleUdpSampleLocked(probe_id, ts);
        });
    udp_tag_ = tag;
    w->set_udp_probe_port(port.port);
    w->set_udp_probe_tag(tag);
    w->set_udp_probe_key(key);
  }

  // A probe the client started over the UDP probe port (server/net/).
  void HandleUdpSampleLocked(uint64_t probe_id, const ProbeTimestamps& ts) {
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
    AddProbeLocked(ts, std::move(r));
  }

  // Judges a complete probe, adds it to the model and writes the Probe
  // record `r` (client id, id, T2–T4 already set) and the model update.
  void AddProbeLocked(const ProbeTimestamps& ts, v1::Record r) {
    const SessionTime t4 = ts.t4;
    v1::Probe* p = r.mutable_probe();
    const OnWire w = ComputeOnWire(ts);
    p->set_t1_session_ns(ts.t1.nanos());
    p->set_offset_ns(w.offset.nanos());
    p->set_delay_ns(w.delay.nanos());
    const bool was_ready = model_.ready();
    const ProbeVerdict verdict = model_.AddProbe(ts);
    const bool accepted = verdict == ProbeVerdict::kAccepted || verdict == ProbeVerdict::kClockJump;
    p->set_accepted(accepted);
    if (!accepted) p->set_reject_reason(ProbeVerdictName(verdict));
    runtime_->AppendRecord(std::move(r)).IgnoreError();
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
    if (verdict == ProbeVerdict::kClockJump) {
      u->set_reason(Cat("restart: client clock jumped (offset now ", w.offset.seconds(), " s)"));
      TM_LOG(kWarning) << "client " << client_.client_id() << " clock jumped; model restarted";
    } else {
      u->set_reason("probe");
    }
    runtime_->AppendRecord(std::move(m)).IgnoreError();
    if (!was_ready) ReleaseHeldLocked();
  }

  void ReleaseHeldLocked() {
    while (!held_.empty()) {
      Held h = std::move(held_.front());
      held_.pop_front();
      HandlePayloadLocked(h.message, h.arrival);
    }
    MaybeFinishGracefullyLocked();
  }

  // The session time of a client reading, and its uncertainty.
  std::pair<SessionTime, Duration> MapLocked(int64_t client_ns) const {
    if (model_.ready()) {
      const ClientTime t = ClientTime::FromNanos(client_ns);
      return {model_.ToSession(t), model_.UncertaintyAt(t)};
    }
    return {SessionTime::FromNanos(client_ns - hello_offset_.nanos()), kHelloMappingUncertainty};
  }

  absl::Status CheckPlausibleLocked(SessionTime event, Duration uncertainty,
                                    SessionTime arrival) const {
    const Limits& limits = service_->options().limits;
    const Duration ahead = event - arrival;
    if (ahead > limits.max_event_future + uncertainty) {
      return absl::InvalidArgumentError(
          Cat("event time lies ", ahead.seconds(), " s after its arrival (limit ",
              (limits.max_event_future + uncertainty).seconds(), " s): check the source clock"));
    }
    if (-ahead > limits.max_event_age) {
      return absl::InvalidArgumentError(Cat("event time is ", (-ahead).seconds(),
                                            " s before its arrival (limit ",
                                            limits.max_event_age.seconds(), " s)"));
    }
    return absl::OkStatus();
  }

  void HandlePayloadLocked(const In& message, SessionTime arrival);

  void Reject(uint64_t client_sequence, const absl::Status& s) {
    v1::ServerMessage m;
    v1::Ack* ack = m.mutable_ack();
    ack->set_client_sequence(client_sequence);
    ack->set_code(static_cast<int32_t>(s.code()));
    ack->set_message(std::string(s.message()));
    out_.push_back(std::move(m));
    WriteNextLocked();
  }

  void AppendLocked(v1::Record record) {
    ++pending_acks_;
    std::weak_ptr<IngestReactor> weak = this->shared_from_this();
    runtime_->AppendClientRecord(std::move(record), [weak](const v1::Ack& ack) {
      auto self = weak.lock();
      if (!self) return;
      std::lock_guard<std::mutex> lock(self->mu_);
      --self->pending_acks_;
      if (self->finished_) return;
      v1::ServerMessage m;
      *m.mutable_ack() = ack;
      self->out_.push_back(std::move(m));
      self->WriteNextLocked();
    });
  }

  void WriteNextLocked() {
    if (writing_ || finished_ || out_.empty()) return;
    current_ = std::move(out_.front());
    out_.pop_front();
    if (current_.has_probe()) {
      // T1 as late as possible: the moment the probe goes to the transport.
      const SessionTime t1 = runtime_->Now();
      current_.mutable_probe()->set_t1_session_ns(t1.nanos());
      sent_probes_[current_.probe().probe_id()] = t1;
      while (sent_probes_.size() > kRememberedProbes) sent_probes_.erase(sent_probes_.begin());
    }
    writing_ = true;
    this->StartWrite(&current_);
  }

  void MaybeFinishGracefullyLocked() {
    if (read_closed_ && pending_acks_ == 0 && held_.empty() && out_.empty() && !writing_) {
      FinishLocked(grpc::Status::OK);
    }
  }

  void FinishLocked(const grpc::Status& status) {
    if (finished_) return;
    finished_ = true;
    end_reason_ = status.ok() ? "closed by client" : status.error_message();
    if (!status.ok() && status.error_code() != grpc::StatusCode::CANCELLED) {
      TM_LOG(kInfo) << Side::kName << " stream ended: " << status.error_message();
    }
    this->Finish(status);
  }

  LiveService* const service_;             // not owned
  grpc::CallbackServerContext* const ctx_;  // valid until OnDone
  std::shared_ptr<IngestReactor> self_;    // keeps this alive until OnDone

  std::mutex mu_;
  In in_;                                  // the message being read
  v1::ServerMessage current_;              // the message being written
  std::deque<v1::ServerMessage> out_;      // waiting to be written
  bool writing_ = false;
  bool read_closed_ = false;
  bool finished_ = false;
  bool hello_done_ = false;
  std::string end_reason_;
  Principal principal_;
  v1::ClientInfo client_;
  std::shared_ptr<SessionRuntime> runtime_;
  int pending_acks_ = 0;                   // appended, not yet acknowledged

  ClockModel model_;
  Duration hello_offset_;                  // client clock − session time from the hello
  int64_t hello_mono_ns_ = 0;
  std::deque<Held> held_;                  // payloads waiting for the first probe
  int burst_left_ = 0;
  int64_t next_probe_mono_ = 0;
  uint64_t last_probe_id_ = 0;
  bool outstanding_probe_ = false;
  int64_t outstanding_since_mono_ = 0;
  std::map<uint64_t, SessionTime> sent_probes_;  // probe id -> T1
  uint64_t udp_tag_ = 0;  // this stream's tag at the probe port; 0: none
  int64_t last_step_start_ns_ = 0;   // agent clock; steps must move forward
  int64_t last_step_end_agent_ns_ = -1;  // explicit end of the last step (agent clock)
  SessionTime last_step_end_session_;    // ... and where it was mapped
};

template <>
void IngestReactor<TrainerSide>::HandlePayloadLocked(const In& message, SessionTime arrival) {
  const v1::FeedbackMessage& f = message.feedback();
  const Limits& limits = service_->options().limits;
  if (f.client_sequence() == 0) {
    return Reject(0, absl::InvalidArgumentError("client_sequence starts at 1"));
  }
  if (!std::isfinite(f.value()) || std::fabs(f.value()) > limits.max_abs_value) {
    return Reject(f.client_sequence(),
                  absl::InvalidArgumentError(Cat("feedback value must be finite and within ±",
                                                 limits.max_abs_value)));
  }
  if (f.event_source_ns() <= 0) {
    return Reject(f.client_sequence(), absl::InvalidArgumentError("event_source_ns must be > 0"));
  }
  if (f.input().size() > 64) {
    return Reject(f.client_sequence(), absl::InvalidArgumentError("input label over 64 bytes"));
  }
  auto [event, uncertainty] = MapLocked(f.event_source_ns());
  if (absl::Status s = CheckPlausibleLocked(event, uncertainty, arrival); !s.ok()) {
    return Reject(f.client_sequence(), s);
  }
  v1::Record r;
  r.set_written_session_ns(arrival.nanos());
  v1::Feedback* fb = r.mutable_feedback();
  fb->set_client_id(client_.client_id());
  fb->set_client_sequence(f.client_sequence());
  fb->set_trainer(principal_.subject);
  fb->set_value(f.value());
  fb->set_event_source_ns(f.event_source_ns());
  fb->set_arrival_session_ns(arrival.nanos());
  fb->set_event_session_ns(event.nanos());
  fb->set_uncertainty_ns(uncertainty.nanos());
  fb->set_input(f.input());
  // Kept either way; a late one may find its steps already settled.
  fb->set_late(arrival - event > runtime_->allowed_lateness());
  AppendLocked(std::move(r));
}

template <>
void IngestReactor<AgentSide>::HandlePayloadLocked(const In& message, SessionTime arrival) {
  const v1::StepMessage& s = message.step();
  const Limits& limits = service_->options().limits;
  const uint64_t cseq = s.client_sequence();
  if (cseq == 0) return Reject(0, absl::InvalidArgumentError("client_sequence starts at 1"));
  if (s.start_agent_ns() <= 0) {
    return Reject(cseq, absl::InvalidArgumentError("start_agent_ns must be > 0"));
  }
  if (s.end_agent_ns() != 0) {
    if (s.end_agent_ns() <= s.start_agent_ns()) {
      return Reject(cseq, absl::InvalidArgumentError("a step must end after it starts"));
    }
    if (s.end_agent_ns() - s.start_agent_ns() > limits.max_step_length.nanos()) {
      return Reject(cseq, absl::InvalidArgumentError(
                              Cat("a step may last at most ", limits.max_step_length.seconds(), " s")));
    }
  }
  if (s.state().size() > limits.max_state_bytes) {
    return Reject(cseq, absl::InvalidArgumentError(Cat("state is ", s.state().size(),
                                                       " bytes; the limit is ",
                                                       limits.max_state_bytes)));
  }
  if (static_cast<uint32_t>(s.features_size()) > limits.max_features) {
    return Reject(cseq, absl::InvalidArgumentError(
                            Cat("at most ", limits.max_features, " features per step")));
  }
  for (float x : s.features()) {
    if (!std::isfinite(x)) {
      return Reject(cseq, absl::InvalidArgumentError("features must be finite"));
    }
  }
  if (s.action().size() > 128) {
    return Reject(cseq, absl::InvalidArgumentError("action name over 128 bytes"));
  }
  if (s.start_agent_ns() <= last_step_start_ns_) {
    return Reject(cseq, absl::InvalidArgumentError(
                            "a step must start after the previous step of this agent"));
  }
  auto [start, uncertainty] = MapLocked(s.start_agent_ns());
  if (s.start_agent_ns() == last_step_end_agent_ns_) {
    start = last_step_end_session_;  // the same instant maps to the same time
  }
  if (absl::Status st = CheckPlausibleLocked(start, uncertainty, arrival); !st.ok()) {
    return Reject(cseq, st);
  }
  last_step_start_ns_ = s.start_agent_ns();
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
    last_known = MapLocked(s.end_agent_ns()).first;
    step->set_end_session_ns(last_known.nanos());
    last_step_end_agent_ns_ = s.end_agent_ns();
    last_step_end_session_ = last_known;
  }
  step->set_late(arrival - last_known > runtime_->allowed_lateness());
  step->set_arrival_session_ns(arrival.nanos());
  step->set_uncertainty_ns(uncertainty.nanos());
  step->set_action(s.action());
  step->set_state(s.state());
  *step->mutable_features() = s.features();
  AppendLocked(std::move(r));
}

// One subscriber: ledger replay, then live records, in sequence order.
class SubscribeReactor final : public grpc::ServerWriteReactor<v1::Record>,
                               public RecordSink,
                               public StreamHandle,
                               public std::enable_shared_from_this<SubscribeReactor> {
 public:
  SubscribeReactor(LiveService* service, grpc::CallbackServerContext* ctx,
                   const v1::SubscribeRequest& req)
      : service_(service), ctx_(ctx), req_(req) {}

  void Start() {
    self_ = shared_from_this();
    std::lock_guard<std::mutex> lock(mu_);
    auto who = AuthenticateContext(*ctx_, *service_->auth());
    if (!who.ok()) return FinishLocked(ToGrpc(who.status()));
    principal_ = *who;
    if (absl::Status s = Authorize(principal_, req_.session_id(),
                                   {v1::ROLE_ADMIN, v1::ROLE_AGENT, v1::ROLE_OBSERVER});
        !s.ok()) {
      return FinishLocked(ToGrpc(s));
    }
    auto runtime = service_->hub()->Get(req_.session_id());
    if (!runtime.ok()) return FinishLocked(ToGrpc(runtime.status()));
    runtime_ = *runtime;
    for (int k : req_.kinds()) kinds_.insert(k);
    next_ = std::max<uint64_t>(1, req_.from_sequence());
    if (req_.stop_at_end() || !runtime_->open()) {
      stop_after_ = service_->hub()->ledger()->CommittedSequence(req_.session_id());
    } else {
      runtime_->AddSink(this);
      runtime_->AddStream(this);
      registered_ = true;
    }
    PumpLocked();
  }

  const std::string& token_id() const override { return principal_.token_id; }

  void End(const grpc::Status& status) override {
    std::lock_guard<std::mutex> lock(mu_);
    if (status.error_code() == grpc::StatusCode::FAILED_PRECONDITION) {
      // Session closing: keep delivering until its "closed" record has gone
      // out (PumpLocked), so a follower sees the whole session.
      return;
    }
    FinishLocked(status);
  }

  void OnCommitted(const std::vector<v1::Record>& records) override {
    {
      std::lock_guard<std::mutex> lock(inbox_mu_);
      if (inbox_.size() + records.size() <= service_->options().subscriber_buffer) {
        inbox_.insert(inbox_.end(), records.begin(), records.end());
      }  // else dropped: PumpLocked refills the gap from the ledger
    }
    if (idle_.load()) {
      std::lock_guard<std::mutex> lock(mu_);
      PumpLocked();
    }
  }

  void OnWriteDone(bool ok) override {
    std::lock_guard<std::mutex> lock(mu_);
    writing_ = false;
    if (!ok) return;
    PumpLocked();
  }

  void OnCancel() override {
    std::lock_guard<std::mutex> lock(mu_);
    FinishLocked(grpc::Status::CANCELLED);
  }

  void OnDone() override {
    if (registered_) {
      runtime_->RemoveSink(this);
      runtime_->RemoveStream(this);
    }
    self_.reset();
  }

 private:
  // Finds the record with sequence next_: from the replay chunk, the live
  // inbox, or a fresh ledger read.
  std::optional<v1::Record> NextLocked() {
    while (!replay_.empty() && replay_.front().sequence() < next_) replay_.pop_front();
    if (!replay_.empty() && replay_.front().sequence() == next_) {
      v1::Record r = std::move(replay_.front());
      replay_.pop_front();
      return r;
    }
    {
      std::lock_guard<std::mutex> lock(inbox_mu_);
      while (!inbox_.empty() && inbox_.front().sequence() < next_) inbox_.pop_front();
      if (!inbox_.empty() && inbox_.front().sequence() == next_) {
        v1::Record r = std::move(inbox_.front());
        inbox_.pop_front();
        return r;
      }
    }
    if (service_->hub()->ledger()->CommittedSequence(req_.session_id()) >= next_) {
      auto chunk = service_->hub()->ledger()->Read(req_.session_id(), next_, 512);
      if (!chunk.ok()) {
        FinishLocked(ToGrpc(chunk.status()));
        return std::nullopt;
      }
      replay_.assign(chunk->begin(), chunk->end());
      if (!replay_.empty() && replay_.front().sequence() == next_) {
        v1::Record r = std::move(replay_.front());
        replay_.pop_front();
        return r;
      }
    }
    return std::nullopt;
  }

  void PumpLocked() {
    if (writing_ || finished_) return;
    while (true) {
      if (next_ > stop_after_) return FinishLocked(grpc::Status::OK);
      std::optional<v1::Record> r = NextLocked();
      if (finished_) return;
      if (!r) {
        if (stop_after_ != kFollow) {
          // Nothing more is coming.
          return FinishLocked(grpc::Status::OK);
        }
        idle_.store(true);
        // A commit may have landed between the check and idle_ = true.
        std::lock_guard<std::mutex> lock(inbox_mu_);
        if (inbox_.empty() || inbox_.front().sequence() > next_) return;
        idle_.store(false);
        continue;
      }
      idle_.store(false);
      next_ = r->sequence() + 1;
      if (r->has_session_event() &&
          r->session_event().event() == v1::SessionEvent::KIND_CLOSED) {
        stop_after_ = r->sequence();
      }
      if (!kinds_.empty() && !kinds_.count(ledger::RecordKindOf(*r))) continue;
      current_ = std::move(*r);
      writing_ = true;
      StartWrite(&current_);
      return;
    }
  }

  void FinishLocked(const grpc::Status& status) {
    if (finished_) return;
    finished_ = true;
    Finish(status);
  }

  static constexpr uint64_t kFollow = std::numeric_limits<uint64_t>::max();

  LiveService* const service_;             // not owned
  grpc::CallbackServerContext* const ctx_;  // valid until OnDone
  const v1::SubscribeRequest req_;
  std::shared_ptr<SubscribeReactor> self_;  // keeps this alive until OnDone

  std::mutex mu_;
  Principal principal_;
  std::shared_ptr<SessionRuntime> runtime_;
  bool registered_ = false;
  std::set<int> kinds_;             // empty: all
  uint64_t next_ = 1;               // next sequence to deliver
  uint64_t stop_after_ = kFollow;   // last sequence to deliver
  bool writing_ = false;
  bool finished_ = false;
  std::deque<v1::Record> replay_;   // a chunk read from the ledger
  v1::Record current_;              // the record being written

  std::mutex inbox_mu_;             // only guards inbox_ (taken by the ledger thread)
  std::deque<v1::Record> inbox_;    // live records, bounded
  std::atomic<bool> idle_{false};   // caught up and waiting for commits
};

}  // namespace

LiveService::LiveService(SessionHub* hub, TokenAuthority* auth, const MonotonicSource* mono,
                         Options options)
    : hub_(hub), auth_(auth), mono_(mono), options_(std::move(options)) {
  ticker_ = std::thread([this] { TickLoop(); });
}

LiveService::~LiveService() { Stop(); }

void LiveService::Stop() {
  {
    std::lock_guard<std::mutex> lock(tick_mu_);
    stopping_ = true;
  }
  tick_cv_.notify_all();
  if (ticker_.joinable()) ticker_.join();
}

void LiveService::Register(std::shared_ptr<Tickable> t) {
  std::lock_guard<std::mutex> lock(tick_mu_);
  tickables_[t.get()] = t;
}

void LiveService::Unregister(Tickable* t) {
  std::lock_guard<std::mutex> lock(tick_mu_);
  tickables_.erase(t);
}

void LiveService::TickLoop() {
  std::unique_lock<std::mutex> lock(tick_mu_);
  while (!stopping_) {
    tick_cv_.wait_for(lock, std::chrono::milliseconds(10));
    std::vector<std::shared_ptr<Tickable>> live;
    for (auto& [raw, weak] : tickables_) {
      if (auto t = weak.lock()) live.push_back(std::move(t));
    }
    lock.unlock();
    for (auto& t : live) t->OnTick();
    live.clear();
    lock.lock();
  }
}

grpc::ServerBidiReactor<v1::TrainerMessage, v1::ServerMessage>* LiveService::Train(
    grpc::CallbackServerContext* ctx) {
  auto r = std::make_shared<IngestReactor<TrainerSide>>(this, ctx);
  r->Start();
  return r.get();
}

grpc::ServerBidiReactor<v1::AgentMessage, v1::ServerMessage>* LiveService::Act(
    grpc::CallbackServerContext* ctx) {
  auto r = std::make_shared<IngestReactor<AgentSide>>(this, ctx);
  r->Start();
  return r.get();
}

grpc::ServerWriteReactor<v1::Record>* LiveService::Subscribe(grpc::CallbackServerContext* ctx,
                                                            const v1::SubscribeRequest* req) {
  auto r = std::make_shared<SubscribeReactor>(this, ctx, *req);
  r->Start();
  return r.get();
}

}  // namespace tickmark::rpc

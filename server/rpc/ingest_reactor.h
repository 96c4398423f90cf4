// One trainer (Train) or agent (Act) stream: Hello → Welcome; then every
// feedback or step is rate-limited, validated (validation.h), mapped to
// session time with the client's clock model, appended to the ledger and
// acknowledged after commit. The server probes the client's clock on the
// stream as its ProbeScheduler says: fast after the hello, then as the
// client's clock model needs. Until the first probe
// comes back, messages wait (at most Options::clock_wait) so they can be
// mapped; after that they are mapped with the hello's clock reading and a
// wide uncertainty.
//
// Ownership: owns itself (self_) from Start until its OnDone work has run;
// closures queued on its strand and pending commit callbacks keep it alive
// a little longer.
//
// Thread safety: every reaction (gRPC, ticker, ledger commit, UDP sample,
// session runtime) only posts a closure to the stream's Strand; all state
// below is touched only from those closures, one at a time, with no lock
// held — so ledger look-ups (hello, duplicate check) never run under a lock
// and a callback that runs on the caller's thread cannot deadlock.
#ifndef TICKMARK_SERVER_RPC_INGEST_REACTOR_H_
#define TICKMARK_SERVER_RPC_INGEST_REACTOR_H_

#include <grpcpp/grpcpp.h>

#include <atomic>
#include <deque>
#include <map>
#include <memory>
#include <mutex>
#include <optional>
#include <string>

#include "server/core/clock_model.h"
#include "server/core/disciplined_clock.h"
#include "server/core/probe_scheduler.h"
#include "server/rpc/live_service.h"
#include "server/rpc/strand.h"
#include "server/rpc/token_bucket.h"
#include "tickmark/v1/admin.pb.h"
#include "tickmark/v1/stream.pb.h"

namespace tickmark::rpc {

// What differs between the trainer and the agent stream.
struct TrainerSide {
  using In = tickmark::v1::TrainerMessage;
  static constexpr tickmark::v1::Role kRole = tickmark::v1::ROLE_TRAINER;
  static constexpr const char* kName = "trainer";
  static constexpr const char* kPayload = "feedback";
  static bool IsHello(const In& m) { return m.has_hello(); }
  static bool IsProbeReply(const In& m) { return m.has_probe_reply(); }
  // Feedback, the messages of a calibration run (moves, answers, finish)
  // and sync pulses.
  static bool IsPayload(const In& m) {
    return m.has_feedback() || m.has_calibration() || m.has_sync_pulse();
  }
  static uint64_t Sequence(const In& m) {
    if (m.has_sync_pulse()) return m.sync_pulse().client_sequence();
    return m.has_calibration() ? m.calibration().client_sequence()
                               : m.feedback().client_sequence();
  }
};

struct AgentSide {
  using In = tickmark::v1::AgentMessage;
  static constexpr tickmark::v1::Role kRole = tickmark::v1::ROLE_AGENT;
  static constexpr const char* kName = "agent";
  static constexpr const char* kPayload = "steps";
  static bool IsHello(const In& m) { return m.has_hello(); }
  static bool IsProbeReply(const In& m) { return m.has_probe_reply(); }
  static bool IsPayload(const In& m) { return m.has_step(); }
  static uint64_t Sequence(const In& m) { return m.step().client_sequence(); }
};

// An event time mapped to session time, and how (MapEventTime).
struct MappedEvent {
  SessionTime at;                   // through the chosen route
  SessionTime round_trip_at;        // through the round-trip model, chosen or not
  Duration uncertainty;             // the chosen route's
  TimeSourceDecision decision;      // which route, and why
  Duration round_trip_uncertainty;  // the round-trip model's, chosen or not
  Duration server_bound;            // the server kernel's maxerror; zero: not read
};

template <typename Side>
class IngestReactor final : public grpc::ServerBidiReactor<grpc::ByteBuffer, grpc::ByteBuffer>,
                            public StreamHandle,
                            public Tickable,
                            public std::enable_shared_from_this<IngestReactor<Side>> {
 public:
  using In = typename Side::In;

  IngestReactor(LiveService* service, grpc::CallbackServerContext* ctx);

  // Call once, from LiveService, with the admission verdict: OK starts
  // reading; anything else ends the stream with that status.
  void Start(const absl::Status& admitted, std::string peer_host);

  // StreamHandle (session runtime; any thread).
  const std::string& token_id() const override { return token_id_; }
  void End(const grpc::Status& status) override;
  std::optional<tickmark::v1::ClientClock> Clock(SessionTime now) const override;

  // gRPC reactions.
  void OnReadDone(bool ok) override;
  void OnWriteDone(bool ok) override;
  void OnCancel() override;
  void OnDone() override;

  // Tickable (ticker thread, when a timer set by Start or UpdateTickDue
  // fires): posts only when something is due.
  void OnTick() override;

 private:
  struct Held {
    In message;
    SessionTime arrival;
  };

  void Post(std::function<void(IngestReactor&)> fn);

  // The closures; all run on the strand.
  void HandleMessage(In message, int64_t arrival_mono);
  void HandleHello(const tickmark::v1::Hello& hello);
  void HandleProbeReply(const tickmark::v1::ProbeReply& reply);
  void HandleUdpSample(uint64_t probe_id, const ProbeTimestamps& ts);
  void AddProbe(const ProbeTimestamps& ts, tickmark::v1::Record r);
  void ReleaseHeld();
  void HandlePayload(const In& message, SessionTime arrival);
  // A calibration run (trainer streams): moves and answers are stored like
  // feedback; a finish waits for the run's earlier events to be committed,
  // fits the calibration on the pool and stores it (calibration_builder.h).
  void HandleCalibration(const tickmark::v1::CalibrationMessage& m, SessionTime arrival);
  void StartCalibrationFinish(const tickmark::v1::CalibrationMessage& m);
  void HandleSyncPulse(const tickmark::v1::SyncPulseMessage& m, SessionTime arrival);
  // Sends the fitted (or stored) calibration, if any, then the finish's Ack.
  void DeliverCalibration(std::optional<tickmark::v1::Calibration> calibration,
                          tickmark::v1::Ack ack);
  // On a trainer's hello: gives the trainer their latest calibration's
  // kernel in this session, unless the session pins kernels or the trainer
  // has a kernel setting there already.
  void MaybeApplyCalibration();
  void Tick();
  void OnAck(tickmark::v1::Ack ack, std::shared_ptr<const tickmark::v1::Record> sent);
  void DeliverAck(const tickmark::v1::Ack& ack);
  void Cleanup();

  std::pair<SessionTime, Duration> Map(int64_t client_ns, absl::Status* error) const;
  // Map, or through real time when ChooseTimeSource says so
  // (docs/time-model.md, "Disciplined clocks"). `span` is how far the
  // event reaches beyond client_ns (a step's length), for the bound.
  MappedEvent MapEventTime(int64_t client_ns, const RealtimeReading& reading, Duration span,
                           absl::Status* error);
  bool TakeRateToken();
  // Answers with a non-zero Ack (counted; `calibration`: a calibration
  // event's, else the stream's feedback or step).
  void Reject(uint64_t client_sequence, const absl::Status& s, bool calibration = false);
  void AppendClient(tickmark::v1::Record record);
  void OpenProbePort(tickmark::v1::Welcome* w);
  void WriteNext();
  void MaybeRead();
  void MaybeFinishGracefully();
  void FinishNow(const grpc::Status& status);
  // Stores the next due time and arms a ticker timer for it; from Tick, a
  // due time already past is retried a little later (see the .cc).
  void UpdateTickDue(bool from_tick = false);

  // What operators see of the clock model (Clock()): copied on the strand
  // when the model or the probe counts change, read from any thread.
  struct ClockView {
    tickmark::v1::ClientInfo client;
    bool probed = false;
    Duration hello_offset;
    ClockEstimate estimate;
    SessionTime reference;  // session time of estimate.reference
    double growth = 0;      // uncertainty added per unit of distance from it
    SessionTime updated;    // the last accepted probe's T4, or the hello
    uint64_t probes = 0;    // answered probes of this stream (stream and UDP)
    uint64_t rejected = 0;  // of which rejected
    uint64_t udp_tag = 0;
  };
  // Counts a probe record and, when the model took it, copies the model.
  void NoteProbe(bool accepted, SessionTime t4);

  LiveService* const service_;              // not owned
  grpc::CallbackServerContext* const ctx_;  // valid until OnDone; used only in Start
  std::shared_ptr<Strand> strand_;
  std::shared_ptr<IngestReactor> self_;  // keeps this alive until Cleanup

  // Set in Start, read-only afterwards.
  std::string peer_;
  std::string peer_host_;
  std::string metadata_secret_;  // from the authorization metadata
  bool admitted_ = false;

  // Read by OnTick on the ticker thread.
  std::atomic<int64_t> hello_deadline_{0};         // limits clock; INT64_MAX once hello is in
  std::atomic<int64_t> tick_due_mono_{INT64_MAX};  // service clock
  std::atomic<bool> tick_posted_{false};
  int64_t armed_due_mono_ = INT64_MAX;  // strand: the due time a ticker timer is set for
  bool batch_acks_ = false;             // set in Start: the client takes AckBatch

  // Written once in HandleHello before AddStream; read by the runtime.
  std::string token_id_;

  // Reading (OnReadDone reads ahead without a hop to the strand while the
  // gate is open; see MaybeRead). A StartRead is issued by StartReadOnce
  // only, from the gRPC thread or the strand.
  static constexpr int kMaxReadAhead = 8;     // read, not yet handled on the strand
  bool StartReadOnce();                       // false: a read is in flight, or finished
  std::atomic<bool> read_in_flight_{false};   // a StartRead is outstanding
  std::atomic<bool> read_ahead_open_{false};  // written on the strand (MaybeRead)
  // The strand asked for a read (MaybeRead) while one was still in flight:
  // OnReadDone starts it once the in-flight read is handed over.
  std::atomic<bool> read_requested_{false};
  std::atomic<int> read_ahead_{0};            // messages posted, not yet handled
  std::atomic<bool> finish_called_{false};    // set by FinishNow before Finish
  std::atomic<int> issuing_{0};               // StartReadOnce calls between check and StartRead

  // Buffers owned by gRPC operations in flight.
  grpc::ByteBuffer in_buf_;   // the read in flight
  grpc::ByteBuffer out_buf_;  // the write in flight

  // Strand state.
  tickmark::v1::ServerMessage current_;          // the message being written
  std::deque<tickmark::v1::ServerMessage> out_;  // waiting to be written
  bool writing_ = false;
  bool read_closed_ = false;
  bool finished_ = false;
  bool hello_done_ = false;
  std::string end_reason_;
  Principal principal_;
  tickmark::v1::ClientInfo client_;
  std::shared_ptr<SessionRuntime> runtime_;
  size_t pending_acks_ = 0;                    // appended, not yet acknowledged
  int64_t reads_paused_until_mono_ = 0;        // after a rate-limit refusal (tarpit)
  std::shared_ptr<TokenBucket> token_bucket_;  // shared by the token's streams
  std::unique_ptr<TokenBucket> stream_bucket_;

  ClockModel model_;
  Duration hello_offset_;  // client clock − session time from the hello
  int64_t hello_mono_ns_ = 0;
  std::deque<Held> held_;  // payloads waiting for the first probe
  ProbeScheduler probes_;  // when to probe next (adaptive probing)
  int64_t next_probe_mono_ = 0;
  uint64_t last_probe_id_ = 0;
  bool outstanding_probe_ = false;
  int64_t outstanding_since_mono_ = 0;
  std::map<uint64_t, SessionTime> sent_probes_;  // probe id -> T1
  uint64_t udp_tag_ = 0;                         // this stream's tag at the probe port; 0: none
  int64_t last_step_start_ns_ = 0;               // agent clock; steps must move forward
  int64_t last_step_end_agent_ns_ = -1;          // explicit end of the last step (agent clock)
  SessionTime last_step_end_session_;            // ... and where it was mapped
  SessionTime last_step_floor_;                  // the last step's mapped end, else its start
  bool last_step_realtime_ = false;              // the last step was mapped through real time

  mutable std::mutex clock_view_mu_;
  ClockView clock_view_;  // GUARDED_BY(clock_view_mu_)
};

// The per-side payload handling (ingest_reactor.cc).
template <>
void IngestReactor<TrainerSide>::HandlePayload(const In& message, SessionTime arrival);
template <>
void IngestReactor<AgentSide>::HandlePayload(const In& message, SessionTime arrival);

extern template class IngestReactor<TrainerSide>;
extern template class IngestReactor<AgentSide>;

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_INGEST_REACTOR_H_

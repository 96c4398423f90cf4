// Live (proto/tickmark/v1/stream.proto): the trainer and agent ingest
// streams and Subscribe, on the gRPC callback API. This class is the thin
// service: it admits streams (caps per peer host and in total), creates
// their reactors and owns what they share — the ticker, the worker pool, the
// rate limiter and the counters.
//
//   IngestReactor<Side>  (ingest_reactor.h)    Train and Act streams
//   SubscribeReactor     (subscribe_reactor.h) Subscribe, SubscribeBatches
//   Ticker               (ticker.h)            probes, hello timeouts
//   validation.h                               pure field and time checks
//
// Train and Act are registered raw (ByteBuffer in and out) so that a message
// that does not decode can be told apart from a client closing its side: it
// ends the stream with INVALID_ARGUMENT and is counted.
//
// With a probe port (Options::probe_port) each Welcome also carries a fresh
// tag and key for client-started UDP probes, whose samples go to the same
// clock model and ledger as the stream's own probes (Probe.transport "udp").
//
// Thread safety: gRPC drives the reactors from its threads; commits arrive
// on the ledger thread; the ticker thread drives probes; UDP samples arrive
// on the probe port's thread. Every reactor serialises its work on its own
// Strand (strand.h), run on the worker pool, so no stream lock is ever held
// while a ledger, engine or runtime callback runs. The accessors are
// thread-safe.
#ifndef TICKMARK_SERVER_RPC_LIVE_SERVICE_H_
#define TICKMARK_SERVER_RPC_LIVE_SERVICE_H_

#include <atomic>
#include <functional>
#include <memory>
#include <string>

#include "server/core/clock_model.h"
#include "server/core/disciplined_clock.h"
#include "server/core/probe_scheduler.h"
#include "server/rpc/auth.h"
#include "server/rpc/rate_limiter.h"
#include "server/rpc/session_hub.h"
#include "server/rpc/stream_admission.h"
#include "server/rpc/ticker.h"
#include "server/rpc/token_bucket.h"
#include "server/rpc/work_pool.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::rpc {

// A side channel on which clients start clock probes themselves (the UDP
// probe port, server/net/). rpc knows it only through these hooks, so rpc and
// net stay independent; TickmarkServer connects them. Unset (port 0): none.
struct ProbePortHooks {
  uint16_t port = 0;  // announced in every Welcome; 0: no probe port
  // Admits a stream: datagrams with `tag`, signed with `key`, are timed with
  // `now` and their samples passed to `on_sample` (from the port's thread).
  std::function<void(uint64_t tag, std::string key, std::function<SessionTime()> now,
                     std::function<void(uint64_t probe_id, const ProbeTimestamps&)> on_sample)>
      add_stream;
  std::function<void(uint64_t tag)> remove_stream;
  // The stream's lost or refused UDP probes (UdpProbeTable::DropsOf), for
  // operators; may be unset.
  std::function<uint64_t(uint64_t tag)> drops;
};

using LiveServiceBase = tickmark::v1::Live::WithRawCallbackMethod_Train<
    tickmark::v1::Live::WithRawCallbackMethod_Act<tickmark::v1::Live::WithCallbackMethod_Subscribe<
        tickmark::v1::Live::WithCallbackMethod_SubscribeBatches<tickmark::v1::Live::Service>>>>;

class LiveService final : public LiveServiceBase {
 public:
  struct Options {
    Limits limits;
    int probe_burst = 8;                                  // probes right after the hello
    Duration probe_burst_spacing = Duration::Millis(50);  // between burst probes
    Duration probe_interval = Duration::Seconds(1);       // afterwards
    Duration probe_timeout = Duration::Seconds(2);        // a probe unanswered this long is dropped
    Duration clock_wait = Duration::Seconds(2);  // longest a message waits for a clock model
    size_t subscriber_buffer = 4096;             // live records buffered per subscriber
    ClockModel::Options clock;
    ProbePortHooks probe_port;  // optional UDP probes
    // Adaptive probing (docs/time-model.md, "Adaptive probing"): its steady
    // interval, burst and burst spacing are probe_interval, probe_burst and
    // probe_burst_spacing above (those fields of `probing` are not read).
    ProbeScheduler::Options probing;
    // Probes a second, all streams together (a token bucket holding one
    // second's worth; 0: no limit). Every probe takes a token if there is
    // one; past the budget only probes at the steady rate go
    // (ProbeScheduler::Admit). Each probe stores a Probe and a
    // ClockModelUpdate record.
    double probe_budget = 500;

    // An ingest stream that sends no hello this long after opening is ended
    // with DEADLINE_EXCEEDED.
    Duration hello_timeout = Duration::Seconds(10);
    // Open Train/Act/Subscribe streams, in total and per client host
    // (0: no cap); past a cap a new stream ends with RESOURCE_EXHAUSTED.
    size_t max_streams = 4096;
    size_t max_streams_per_peer = 512;
    // Token buckets, per token and per stream alike: feedback at a human's
    // pace; steps at an agent's. Past either, the message is answered with
    // an Ack RESOURCE_EXHAUSTED and not stored; the stream stays open.
    // A rate <= 0 turns that limit off.
    double feedback_rate = 50;  // per second
    double feedback_burst = 100;
    double step_rate = 2000;  // per second
    double step_burst = 4000;
    // Messages a stream may have appended but not yet acknowledged (or
    // acknowledged but not yet written); past it the stream is not read
    // until acks drain, so one flooding stream cannot fill the ledger queue
    // ahead of everyone else.
    size_t max_in_flight_per_stream = 256;
    // Extra room, beyond a feedback's stated uncertainty, for an event time
    // after its arrival (validation.h, JudgeEventTime). 0 in production;
    // tests that script events ahead of arrival raise it.
    Duration event_future_tolerance = Duration::Zero();
    // Threads that run stream work and the ledger look-ups streams need.
    int worker_threads = 4;
    // Bootstrap resamples for a calibration's intervals (0: none).
    int calibration_resamples = 1000;
    // Threads that fit calibrations (a fit with its bootstrap takes seconds,
    // so it never runs on the stream workers); at least 1.
    int calibration_threads = 1;
    // Clock for rate limits and the hello timeout; null: the service's
    // monotonic clock. Tests drive it by hand.
    const MonotonicSource* limits_clock = nullptr;
    // Disciplined clocks (docs/time-model.md, "Disciplined clocks"): map a
    // feedback or step through real time when the client sent a reading,
    // both kernels say synchronised and the bounds beat the round trip.
    // tickmarkd --no-realtime-mapping turns it off.
    bool realtime_mapping = true;
    // The server's own clock discipline; null: the running kernel
    // (KernelDiscipline). A test hook: tests inject a FakeDiscipline. Not
    // owned; outlives the service.
    const ClockDiscipline* discipline = nullptr;
    // The server's discipline state is read again at most this often.
    Duration discipline_refresh = Duration::Seconds(1);
  };

  // Counters, for operators and tests.
  struct Stats {
    uint64_t undecodable_messages = 0;  // Train/Act messages that did not parse
    uint64_t hello_timeouts = 0;        // streams ended for sending no hello
    uint64_t refused_streams = 0;       // streams refused by a cap
    uint64_t rate_limited = 0;          // messages refused by a rate limit
    uint64_t future_events = 0;         // feedback refused: event after arrival
    uint64_t clamped_events = 0;        // feedback clamped to arrival (new clock model)
    uint64_t content_mismatches = 0;    // resends with different content
  };

  LiveService(SessionHub* hub, TokenAuthority* auth, const MonotonicSource* mono, Options options);
  ~LiveService() override;

  grpc::ServerBidiReactor<grpc::ByteBuffer, grpc::ByteBuffer>* Train(
      grpc::CallbackServerContext* ctx) override;
  grpc::ServerBidiReactor<grpc::ByteBuffer, grpc::ByteBuffer>* Act(
      grpc::CallbackServerContext* ctx) override;
  grpc::ServerWriteReactor<tickmark::v1::Record>* Subscribe(
      grpc::CallbackServerContext* ctx, const tickmark::v1::SubscribeRequest* req) override;
  grpc::ServerWriteReactor<tickmark::v1::RecordBatch>* SubscribeBatches(
      grpc::CallbackServerContext* ctx, const tickmark::v1::SubscribeRequest* req) override;

  // Stops the ticker and the worker pool; call after the gRPC server has
  // shut down.
  void Stop();

  Stats stats() const;
  // Messages of one client refused by a rate limit.
  uint64_t RateLimitedOf(const std::string& session_id, const std::string& client_id) const;

  // Internal: used by the reactors.
  SessionHub* hub() const { return hub_; }
  TokenAuthority* auth() const { return auth_; }
  const MonotonicSource* mono() const { return mono_; }
  const MonotonicSource* limits_clock() const { return limits_clock_; }
  const Options& options() const { return options_; }
  Ticker& ticker() { return ticker_; }
  WorkPool& pool() { return pool_; }
  WorkPool& fit_pool() { return fit_pool_; }
  RateLimiter& rate_limiter() { return rate_limiter_; }
  TokenBucket& probe_budget() { return probe_budget_; }
  // The probe schedule of a new stream (Options::probing with the steady
  // interval and burst filled in).
  ProbeScheduler::Options probe_schedule() const;
  DisciplineCache& discipline() { return discipline_; }
  StreamAdmission& admission() { return admission_; }
  struct Counters {
    std::atomic<uint64_t> undecodable{0};
    std::atomic<uint64_t> hello_timeouts{0};
    std::atomic<uint64_t> refused_streams{0};
    std::atomic<uint64_t> future_events{0};
    std::atomic<uint64_t> clamped_events{0};
    std::atomic<uint64_t> content_mismatches{0};
  };
  Counters& counters() { return counters_; }

 private:
  SessionHub* const hub_;              // not owned
  TokenAuthority* const auth_;         // not owned
  const MonotonicSource* const mono_;  // not owned
  const Options options_;
  const MonotonicSource* const limits_clock_;  // not owned

  Counters counters_;
  DisciplineCache discipline_;  // the server's own kernel state, shared by the streams
  RateLimiter rate_limiter_;
  TokenBucket probe_budget_;  // Options::probe_budget, shared by every stream
  StreamAdmission admission_;
  WorkPool pool_;      // before ticker_: the ticker posts to strands that run here
  WorkPool fit_pool_;  // calibration fits (LiveService::Options::calibration_threads)
  Ticker ticker_;
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_LIVE_SERVICE_H_

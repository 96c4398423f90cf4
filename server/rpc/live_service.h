// Live (proto/tickmark/v1/stream.proto): the trainer and agent ingest
// streams and Subscribe, on the gRPC callback API.
//
// Ingest streams: Hello → Welcome; then every feedback/step is validated,
// mapped to session time with the client's clock model, appended to the
// ledger and acknowledged after commit. The server probes each client's
// clock on its own stream: a burst after the hello, then periodically.
// Until the first probe comes back, messages wait (at most
// Options::clock_wait) so they can be mapped; after that they are mapped
// with the hello's clock reading and a wide uncertainty.
//
// Subscribe: replays the ledger from the requested sequence, then follows
// live commits with no gap and no duplicate. Each subscriber has a bounded
// buffer; when it overflows the subscriber falls back to reading the ledger,
// so a stalled subscriber never slows ingest or other subscribers.
//
// With a probe port (Options::probe_port) each Welcome also carries a fresh
// tag and key for client-started UDP probes, whose samples go to the same
// clock model and ledger as the stream's own probes (Probe.transport "udp").
//
// Thread safety: gRPC drives the reactors from its threads; commits arrive
// on the ledger thread; a ticker thread drives probes; UDP samples arrive
// on the probe port's thread. Each reactor serialises its state with its
// own mutex.
#ifndef TICKMARK_SERVER_RPC_LIVE_SERVICE_H_
#define TICKMARK_SERVER_RPC_LIVE_SERVICE_H_

#include <atomic>
#include <condition_variable>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <set>
#include <string>
#include <thread>

#include "server/core/clock_model.h"
#include "server/rpc/auth.h"
#include "server/rpc/session_hub.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::rpc {

// Something the ticker drives.
class Tickable {
 public:
  virtual ~Tickable() = default;
  virtual void OnTick() = 0;
};

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
};

class LiveService final : public tickmark::v1::Live::CallbackService {
 public:
  struct Options {
    Limits limits;
    int probe_burst = 8;                                  // probes right after the hello
    Duration probe_burst_spacing = Duration::Millis(50);  // between burst probes
    Duration probe_interval = Duration::Seconds(1);       // afterwards
    Duration probe_timeout = Duration::Seconds(2);        // a probe unanswered this long is dropped
    Duration clock_wait = Duration::Seconds(2);           // longest a message waits for a clock model
    size_t subscriber_buffer = 4096;                      // live records buffered per subscriber
    ClockModel::Options clock;
    ProbePortHooks probe_port;                            // optional UDP probes
  };

  LiveService(SessionHub* hub, TokenAuthority* auth, const MonotonicSource* mono, Options options);
  ~LiveService() override;

  grpc::ServerBidiReactor<tickmark::v1::TrainerMessage, tickmark::v1::ServerMessage>* Train(
      grpc::CallbackServerContext* ctx) override;
  grpc::ServerBidiReactor<tickmark::v1::AgentMessage, tickmark::v1::ServerMessage>* Act(
      grpc::CallbackServerContext* ctx) override;
  grpc::ServerWriteReactor<tickmark::v1::Record>* Subscribe(
      grpc::CallbackServerContext* ctx, const tickmark::v1::SubscribeRequest* req) override;

  // Stops the ticker; call after the gRPC server has shut down.
  void Stop();

  // Internal: used by the reactors.
  void Register(std::shared_ptr<Tickable> t);
  void Unregister(Tickable* t);
  SessionHub* hub() const { return hub_; }
  TokenAuthority* auth() const { return auth_; }
  const MonotonicSource* mono() const { return mono_; }
  const Options& options() const { return options_; }

 private:
  void TickLoop();

  SessionHub* const hub_;            // not owned
  TokenAuthority* const auth_;       // not owned
  const MonotonicSource* const mono_;  // not owned
  const Options options_;

  std::mutex tick_mu_;
  std::condition_variable tick_cv_;                       // wakes the ticker to stop
  std::map<Tickable*, std::weak_ptr<Tickable>> tickables_;  // GUARDED_BY(tick_mu_)
  bool stopping_ = false;                                 // GUARDED_BY(tick_mu_)
  std::thread ticker_;                                    // runs TickLoop
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_LIVE_SERVICE_H_

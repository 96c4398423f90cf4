#include "server/rpc/live_service.h"

#include <algorithm>
#include <mutex>

#include "absl/synchronization/mutex.h"
#include "server/rpc/ingest_reactor.h"
#include "server/rpc/subscribe_reactor.h"

namespace tickmark::rpc {

LiveService::LiveService(SessionHub* hub, TokenAuthority* auth, const MonotonicSource* mono,
                         Options options)
    : hub_(hub),
      auth_(auth),
      mono_(mono),
      options_(std::move(options)),
      limits_clock_(options_.limits_clock ? options_.limits_clock : mono),
      discipline_(options_.discipline ? options_.discipline : KernelDiscipline::Get(), mono,
                  options_.discipline_refresh),
      rate_limiter_(limits_clock_),
      probe_budget_(options_.probe_budget, std::max(options_.probe_budget, 1.0), mono),
      admission_(options_.max_streams, options_.max_streams_per_peer),
      pool_(options_.worker_threads),
      fit_pool_(std::max(1, options_.calibration_threads)) {
  // gRPC locks with absl::Mutex, whose deadlock detection (on in Debian's
  // build) records every lock-order edge in a global graph: a profile of
  // 10k trainer connections showed GraphCycles::GetId/InsertEdge among the
  // top server symbols. Our own locks are std::mutex; TSan finds lock-order
  // bugs in tests. Process-wide, set once.
  static std::once_flag no_cycle_detection;
  std::call_once(no_cycle_detection,
                 [] { absl::SetMutexDeadlockDetectionMode(absl::OnDeadlockCycle::kIgnore); });
}

LiveService::~LiveService() { Stop(); }

ProbeScheduler::Options LiveService::probe_schedule() const {
  ProbeScheduler::Options o = options_.probing;
  o.steady_interval = options_.probe_interval;
  o.burst = options_.probe_burst;
  o.burst_interval = options_.probe_burst_spacing;
  return o;
}

void LiveService::Stop() {
  ticker_.Stop();
  fit_pool_.Stop();  // before pool_: finished fits post to the streams' strands
  pool_.Stop();
}

LiveService::Stats LiveService::stats() const {
  Stats s;
  s.undecodable_messages = counters_.undecodable.load();
  s.hello_timeouts = counters_.hello_timeouts.load();
  s.refused_streams = counters_.refused_streams.load();
  s.rate_limited = rate_limiter_.TotalLimited();
  s.future_events = counters_.future_events.load();
  s.clamped_events = counters_.clamped_events.load();
  s.content_mismatches = counters_.content_mismatches.load();
  return s;
}

uint64_t LiveService::RateLimitedOf(const std::string& session_id,
                                    const std::string& client_id) const {
  return rate_limiter_.Limited(session_id + "/" + client_id);
}

namespace {

// Admits a new stream or says why not (counted).
absl::Status Admit(LiveService* service, const std::string& host) {
  absl::Status s = service->admission().Admit(host);
  if (!s.ok()) service->counters().refused_streams.fetch_add(1);
  return s;
}

}  // namespace

grpc::ServerBidiReactor<grpc::ByteBuffer, grpc::ByteBuffer>* LiveService::Train(
    grpc::CallbackServerContext* ctx) {
  std::string host = PeerHost(ctx->peer());
  auto r = std::make_shared<IngestReactor<TrainerSide>>(this, ctx);
  const absl::Status admitted = Admit(this, host);  // before host is moved
  r->Start(admitted, std::move(host));
  return r.get();
}

grpc::ServerBidiReactor<grpc::ByteBuffer, grpc::ByteBuffer>* LiveService::Act(
    grpc::CallbackServerContext* ctx) {
  std::string host = PeerHost(ctx->peer());
  auto r = std::make_shared<IngestReactor<AgentSide>>(this, ctx);
  const absl::Status admitted = Admit(this, host);  // before host is moved
  r->Start(admitted, std::move(host));
  return r.get();
}

namespace {

template <class Reactor>
Reactor* StartSubscriber(LiveService* service, grpc::CallbackServerContext* ctx,
                         const tickmark::v1::SubscribeRequest& req) {
  std::string host = PeerHost(ctx->peer());
  auto r = std::make_shared<Reactor>(service, ctx, req);
  const absl::Status admitted = Admit(service, host);  // before host is moved
  r->Start(admitted, std::move(host));
  return r.get();
}

}  // namespace

grpc::ServerWriteReactor<tickmark::v1::Record>* LiveService::Subscribe(
    grpc::CallbackServerContext* ctx, const tickmark::v1::SubscribeRequest* req) {
  return StartSubscriber<SubscribeReactor>(this, ctx, *req);
}

grpc::ServerWriteReactor<tickmark::v1::RecordBatch>* LiveService::SubscribeBatches(
    grpc::CallbackServerContext* ctx, const tickmark::v1::SubscribeRequest* req) {
  return StartSubscriber<BatchSubscribeReactor>(this, ctx, *req);
}

}  // namespace tickmark::rpc

// One subscriber (Subscribe, SubscribeBatches): replays the ledger from the
// requested sequence, then follows live commits with no gap and no
// duplicate. It keeps a bounded inbox of live records; when that overflows it
// falls back to reading the ledger, so a stalled subscriber never slows
// ingest or other subscribers.
//
// Out is what one write carries: a Record (Subscribe) or a RecordBatch
// (SubscribeBatches), which takes every record ready when the write starts
// (kMaxBatchRecords, kMaxBatchBytes), so a burst costs one write and one
// strand hop instead of one per record.
//
// Ownership: owns itself (self_) from Start until its OnDone work has run.
//
// Thread safety: reactions (gRPC, commits on the ledger thread, the session
// runtime ending streams with its own locks held) only queue: commits into
// the inbox (inbox_mu_, held for the copy only), everything else as a
// closure on the Strand. Ledger reads (token, replay chunks) run in strand
// closures on the worker pool with no lock held.
#ifndef TICKMARK_SERVER_RPC_SUBSCRIBE_REACTOR_H_
#define TICKMARK_SERVER_RPC_SUBSCRIBE_REACTOR_H_

#include <grpcpp/grpcpp.h>

#include <atomic>
#include <deque>
#include <limits>
#include <memory>
#include <mutex>
#include <optional>
#include <set>
#include <string>
#include <type_traits>

#include "server/rpc/live_service.h"
#include "server/rpc/strand.h"
#include "tickmark/v1/stream.pb.h"

namespace tickmark::rpc {

template <class Out>
class BasicSubscribeReactor final
    : public grpc::ServerWriteReactor<Out>,
      public RecordSink,
      public StreamHandle,
      public std::enable_shared_from_this<BasicSubscribeReactor<Out>> {
 public:
  static constexpr bool kBatches = std::is_same_v<Out, tickmark::v1::RecordBatch>;
  // A batch ends at this many records, or at the record that takes it past
  // kMaxBatchBytes (a single larger record goes alone): well under gRPC's
  // default 4 MiB receive limit, and a few hundred records already make the
  // per-message cost small beside the records' own.
  static constexpr int kMaxBatchRecords = 256;
  static constexpr size_t kMaxBatchBytes = size_t{1} << 20;

  BasicSubscribeReactor(LiveService* service, grpc::CallbackServerContext* ctx,
                        const tickmark::v1::SubscribeRequest& req);

  // Call once, from LiveService, with the admission verdict.
  void Start(const absl::Status& admitted, std::string peer_host);

  // StreamHandle / RecordSink (any thread; may hold runtime locks).
  const std::string& token_id() const override { return token_id_; }
  void End(const grpc::Status& status) override;
  void OnCommitted(const std::vector<tickmark::v1::Record>& records) override;

  // gRPC reactions.
  void OnWriteDone(bool ok) override;
  void OnCancel() override;
  void OnDone() override;

 private:
  void Post(std::function<void(BasicSubscribeReactor&)> fn);
  void PostPump();

  // Strand closures.
  void Begin();
  void Pump();
  std::optional<tickmark::v1::Record> Next();
  void Write();
  void FinishNow(const grpc::Status& status);
  void Cleanup();

  static constexpr uint64_t kFollow = std::numeric_limits<uint64_t>::max();
  // The session is owned by another instance (several instances on one
  // database): no runtime here; records are read from the ledger, woken by
  // the database's commit notifications (SessionHub::Watch). Strand only.
  bool remote_ = false;

  LiveService* const service_;              // not owned
  grpc::CallbackServerContext* const ctx_;  // valid until OnDone; used only in Start
  const tickmark::v1::SubscribeRequest req_;
  std::shared_ptr<Strand> strand_;
  std::shared_ptr<BasicSubscribeReactor> self_;  // keeps this alive until Cleanup

  // Set in Start, read-only afterwards.
  std::string metadata_secret_;
  std::string peer_host_;
  bool admitted_ = false;
  // Written once in Begin before AddStream; read by the runtime.
  std::string token_id_;

  // Strand state.
  Principal principal_;
  std::shared_ptr<SessionRuntime> runtime_;
  bool registered_ = false;
  std::set<int> kinds_;            // empty: all
  uint64_t next_ = 1;              // next sequence to deliver
  uint64_t stop_after_ = kFollow;  // last sequence to deliver
  bool writing_ = false;
  bool finished_ = false;
  std::deque<tickmark::v1::Record> replay_;  // a chunk read from the ledger
  Out current_;                              // the record or batch being written
  size_t batch_bytes_ = 0;                   // SubscribeBatches: current_'s records' size

  std::mutex inbox_mu_;                     // guards inbox_ only; never held while calling out
  std::deque<tickmark::v1::Record> inbox_;  // live records, bounded
  std::atomic<bool> idle_{false};           // caught up and waiting for commits
  std::atomic<bool> pump_posted_{false};    // a Pump from OnCommitted is queued
};

using SubscribeReactor = BasicSubscribeReactor<tickmark::v1::Record>;
using BatchSubscribeReactor = BasicSubscribeReactor<tickmark::v1::RecordBatch>;

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_SUBSCRIBE_REACTOR_H_

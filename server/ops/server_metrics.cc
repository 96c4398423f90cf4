#include "server/ops/server_metrics.h"

#include <array>
#include <atomic>

#include "server/ops/metrics.h"

#ifndef TICKMARK_VERSION
#define TICKMARK_VERSION "unknown"
#endif

namespace tickmark::ops {
namespace {

constexpr std::array<const char*, kIngestKinds> kKindNames = {"feedback", "step",
                                                              "calibration_event"};
constexpr std::array<const char*, kStreamRoles> kRoleNames = {"trainer", "agent", "subscriber"};
// gRPC status code names (grpc/include/grpcpp/support/status_code_enum.h),
// lower case, by code.
constexpr int kCodes = 17;
constexpr std::array<const char*, kCodes> kCodeNames = {
    "ok",        "cancelled",      "unknown",           "invalid_argument",   "deadline_exceeded",
    "not_found", "already_exists", "permission_denied", "resource_exhausted", "failed_precondition",
    "aborted",   "out_of_range",   "unimplemented",     "internal",           "unavailable",
    "data_loss", "unauthenticated"};

constexpr double kNanosPerSecond = 1e9;

struct ServerMetrics {
  ServerMetrics() {
    Registry& r = Registry::Default();
    r.AddGauge("tickmark_build_info", "The running tickmarkd's version (value always 1).",
               {"version"})
        .With({TICKMARK_VERSION})
        .Set(1);
    CounterFamily& stored_f = r.AddCounter(
        "tickmark_ingest_stored_total",
        "Messages from trainers and agents stored in the ledger and acknowledged.", {"kind"});
    CounterFamily& dup_f = r.AddCounter(
        "tickmark_ingest_duplicates_total",
        "Resent messages (same client id and sequence) acknowledged again without storing.",
        {"kind"});
    rejected_f = &r.AddCounter(
        "tickmark_ingest_rejected_total",
        "Messages refused with a non-zero Ack code, by kind and gRPC status code (reason).",
        {"kind", "reason"});
    HistogramFamily& ack_f =
        r.AddHistogram("tickmark_ack_latency_seconds",
                       "From a message's arrival to its acknowledgement after the ledger commit.",
                       {"kind"}, ExponentialBuckets(0.0005, 2, 15));
    HistogramFamily& unc_f =
        r.AddHistogram("tickmark_clock_uncertainty_seconds",
                       "Stated uncertainty (half-width) of each stored event's session time.",
                       {"kind"}, ExponentialBuckets(0.00001, 2, 20));
    for (int k = 0; k < kIngestKinds; ++k) {
      stored[k] = &stored_f.With({kKindNames[k]});
      duplicates[k] = &dup_f.With({kKindNames[k]});
      ack_latency[k] = &ack_f.With({kKindNames[k]});
      uncertainty[k] = &unc_f.With({kKindNames[k]});
    }
    GaugeFamily& streams_f = r.AddGauge(
        "tickmark_open_streams", "Open Train, Act and Subscribe streams, by role.", {"role"});
    for (int k = 0; k < kStreamRoles; ++k) streams[k] = &streams_f.With({kRoleNames[k]});
    commit = &r.AddHistogram("tickmark_ledger_commit_seconds",
                             "Ledger transactions of appended records, BEGIN to COMMIT.", {},
                             ExponentialBuckets(0.0001, 2, 16))
                  .With({});
    committed =
        &r.AddCounter("tickmark_ledger_committed_records_total", "Records committed to the ledger.")
             .With({});
    queue = &r.AddGauge("tickmark_ledger_queue_depth",
                        "Writes waiting for the ledger writer (appends and operations).")
                 .With({});
    writable = &r.AddGauge("tickmark_ledger_writable",
                           "1 while ledger writes succeed; 0 while they fail (health "
                           "NOT_SERVING).")
                    .With({});
    writable->Set(1);
    disk_full = &r.AddGauge("tickmark_ledger_disk_full",
                            "1 while ledger writes fail because the disk is full.")
                     .With({});
    backlog = &r.AddHistogram("tickmark_subscriber_backlog_records",
                              "A subscriber's buffered live records, observed each time a "
                              "commit is handed to it.",
                              {}, ExponentialBuckets(1, 2, 13))
                   .With({});
    overflow = &r.AddCounter("tickmark_subscriber_overflow_records_total",
                             "Live records a full subscriber buffer did not take (the "
                             "subscriber reads them from the ledger instead).")
                    .With({});
    lease_owned =
        &r.AddGauge("tickmark_session_lease_owned",
                    "1 while this instance owns the session's lease, else 0.", {"session"});
    lease_token = &r.AddGauge("tickmark_session_lease_fencing_token",
                              "The fencing token of the session's lease this instance holds "
                              "or last held.",
                              {"session"});
  }

  Counter& Rejected(IngestKind kind, int code) {
    const size_t c = code >= 0 && code < kCodes ? static_cast<size_t>(code) : 2;  // unknown
    std::atomic<Counter*>& slot = rejected[static_cast<size_t>(kind)][c];
    Counter* counter = slot.load(std::memory_order_acquire);
    if (counter == nullptr) {  // first of its kind: the family's lock, once
      counter = &rejected_f->With({kKindNames[static_cast<size_t>(kind)], kCodeNames[c]});
      slot.store(counter, std::memory_order_release);
    }
    return *counter;
  }

  std::array<Counter*, kIngestKinds> stored{};
  std::array<Counter*, kIngestKinds> duplicates{};
  CounterFamily* rejected_f = nullptr;
  std::array<std::array<std::atomic<Counter*>, kCodes>, kIngestKinds> rejected{};
  std::array<Histogram*, kIngestKinds> ack_latency{};
  std::array<Histogram*, kIngestKinds> uncertainty{};
  std::array<Gauge*, kStreamRoles> streams{};
  Histogram* commit = nullptr;
  Counter* committed = nullptr;
  Gauge* queue = nullptr;
  Gauge* writable = nullptr;
  Gauge* disk_full = nullptr;
  Histogram* backlog = nullptr;
  Counter* overflow = nullptr;
  GaugeFamily* lease_owned = nullptr;
  GaugeFamily* lease_token = nullptr;
};

ServerMetrics& M() {
  static ServerMetrics* m = new ServerMetrics();  // never destroyed, like the registry
  return *m;
}

size_t Index(IngestKind k) { return static_cast<size_t>(k); }
size_t Index(StreamRole r) { return static_cast<size_t>(r); }

}  // namespace

void RegisterServerMetrics() { M(); }

void CountIngest(IngestKind kind, int code, bool duplicate) {
  ServerMetrics& m = M();
  if (code != 0) {
    m.Rejected(kind, code).Inc();
  } else if (duplicate) {
    m.duplicates[Index(kind)]->Inc();
  } else {
    m.stored[Index(kind)]->Inc();
  }
}

void ObserveAckLatency(IngestKind kind, int64_t nanos) {
  M().ack_latency[Index(kind)]->Observe(static_cast<double>(nanos) / kNanosPerSecond);
}

void ObserveClockUncertainty(IngestKind kind, int64_t nanos) {
  M().uncertainty[Index(kind)]->Observe(static_cast<double>(nanos) / kNanosPerSecond);
}

void StreamOpened(StreamRole role) { M().streams[Index(role)]->Add(1); }
void StreamClosed(StreamRole role) { M().streams[Index(role)]->Sub(1); }

void ObserveLedgerCommit(int64_t nanos, size_t records) {
  ServerMetrics& m = M();
  m.commit->Observe(static_cast<double>(nanos) / kNanosPerSecond);
  m.committed->Inc(records);
}

void SetLedgerQueueDepth(size_t depth) { M().queue->Set(static_cast<double>(depth)); }

void SetLedgerWriteHealth(int code) {
  constexpr int kResourceExhausted = 8;  // gRPC and absl agree on the numbers
  ServerMetrics& m = M();
  m.writable->Set(code == 0 ? 1 : 0);
  m.disk_full->Set(code == kResourceExhausted ? 1 : 0);
}

void ObserveSubscriberBacklog(size_t records) {
  M().backlog->Observe(static_cast<double>(records));
}

void CountSubscriberOverflow(size_t records) { M().overflow->Inc(records); }

void SetSessionLease(const std::string& session_id, bool owned, uint64_t fencing_token) {
  ServerMetrics& m = M();
  m.lease_owned->With({session_id}).Set(owned ? 1 : 0);
  m.lease_token->With({session_id}).Set(static_cast<double>(fencing_token));
}

void ForgetSessionLease(const std::string& session_id) {
  ServerMetrics& m = M();
  m.lease_owned->Remove({session_id});
  m.lease_token->Remove({session_id});
}

}  // namespace tickmark::ops

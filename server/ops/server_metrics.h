// tickmarkd's own metrics (docs/operations.md lists each with its meaning
// and unit), in Registry::Default(), as one-line calls for the places that
// count. Every call is a few relaxed atomic operations on a metric looked up
// once: safe on the ingest, delivery and ledger-writer hot paths, from any
// thread.
//
// Adding one (DEVELOPERS.md, "Metrics"): a field in ServerMetrics
// (server_metrics.cc) made in its constructor, a function here, a line at the
// call site, a row in docs/operations.md.
#ifndef TICKMARK_SERVER_OPS_SERVER_METRICS_H_
#define TICKMARK_SERVER_OPS_SERVER_METRICS_H_

#include <cstddef>
#include <cstdint>
#include <string>

namespace tickmark::ops {

// What a trainer or agent sent that gets an Ack.
enum class IngestKind { kFeedback = 0, kStep = 1, kCalibrationEvent = 2 };
inline constexpr int kIngestKinds = 3;
// Open streams, by the role they serve.
enum class StreamRole { kTrainer = 0, kAgent = 1, kSubscriber = 2 };
inline constexpr int kStreamRoles = 3;

// Makes every family, so /metrics lists them all from the start (a family
// without children shows only its HELP and TYPE lines). Idempotent; the
// functions below call it themselves.
void RegisterServerMetrics();

// One acknowledged message: `code` is the Ack's gRPC status code (0: stored,
// or with `duplicate` a resend of a stored one); a non-zero code counts as
// rejected with the code's name as the reason.
void CountIngest(IngestKind kind, int code, bool duplicate = false);
// From a message's arrival to its acknowledgement after commit.
void ObserveAckLatency(IngestKind kind, int64_t nanos);
// The stated uncertainty of a stored event's session time.
void ObserveClockUncertainty(IngestKind kind, int64_t nanos);

void StreamOpened(StreamRole role);
void StreamClosed(StreamRole role);

// One ledger transaction of `records` appended records, BEGIN to COMMIT.
void ObserveLedgerCommit(int64_t nanos, size_t records);
// Writes waiting for the ledger writer (appends and synchronous operations).
void SetLedgerQueueDepth(size_t depth);
// The ledger's write health as Ledger::WriteHealth() says: `code` 0 writable;
// RESOURCE_EXHAUSTED (8) disk full; anything else failing.
void SetLedgerWriteHealth(int code);

// A subscriber's buffered live records after a commit was handed to it.
void ObserveSubscriberBacklog(size_t records);
// Live records a full subscriber buffer did not take (it catches up from
// the ledger instead).
void CountSubscriberOverflow(size_t records);

// Session leases (several instances on one database): whether this
// instance owns `session_id`'s lease, and the fencing token it holds.
// Call on every change; ForgetSessionLease when the session is no longer
// tracked here (closed, or the lease given up and forgotten).
void SetSessionLease(const std::string& session_id, bool owned, uint64_t fencing_token);
void ForgetSessionLease(const std::string& session_id);

}  // namespace tickmark::ops

#endif  // TICKMARK_SERVER_OPS_SERVER_METRICS_H_

// Live state of sessions: each open session's clock, deduplication of
// resent messages, the streams attached to it and the sinks (subscribers)
// that receive committed records.
//
// Data flow: a stream reactor validates a message, builds a Record and calls
// SessionRuntime::AppendClientRecord. The ledger assigns the sequence and
// commits; on commit (ledger writer thread) the runtime acknowledges to the
// stream and hands the records, in sequence order, to every sink.
//
// Thread safety: everything here is thread-safe. Sinks and stream handles
// are called with the runtime's sink/stream lock held; they must not call
// back into the runtime from those calls. No ledger method (and so no
// commit callback a ledger runs on the caller's thread) and no credit
// engine call is ever made while the runtime's client-state lock is held,
// so a ledger may run callbacks on the caller's thread; `done` callbacks
// given to the runtime may run on the caller's thread too.
#ifndef TICKMARK_SERVER_RPC_SESSION_HUB_H_
#define TICKMARK_SERVER_RPC_SESSION_HUB_H_

#include <grpcpp/support/status.h>

#include <atomic>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <optional>
#include <set>
#include <string>
#include <vector>

#include "server/core/delay_kernel.h"
#include "server/core/time.h"
#include "server/ledger/ledger.h"
#include "server/rpc/credit_driver.h"
#include "tickmark/v1/admin.pb.h"
#include "tickmark/v1/stream.pb.h"

namespace tickmark::audit {
class ReceiptKey;  // server/audit/receipt.h
}  // namespace tickmark::audit

namespace tickmark::rpc {

// Bounds on what clients may send (docs/architecture.md §7: validated at the edge).
struct Limits {
  uint32_t max_state_bytes = 64 * 1024;
  uint32_t max_features = 4096;
  double max_abs_value = 1000;
  // Event times older than this before arrival are implausible.
  Duration max_event_age = Duration::Seconds(600);
  // Event times later than arrival by more than this (beyond the mapping's
  // uncertainty) are implausible.
  Duration max_event_future = Duration::Seconds(5);
  Duration max_step_length = Duration::Seconds(3600);
};

// The ack refusing a client's message: the status's code and message.
v1::Ack ErrorAck(uint64_t client_sequence, const absl::Status& s);

// A live stream the session can end (session closed, token revoked).
class StreamHandle {
 public:
  virtual ~StreamHandle() = default;
  virtual const std::string& token_id() const = 0;
  // Ends the stream with this status; may be called from any thread.
  virtual void End(const grpc::Status& status) = 0;
  // The client's clock as the stream models it at session time `now`, for
  // operators (SessionSummary.clocks); nullopt for streams without one. May
  // be called from any thread; must not call back into the runtime.
  virtual std::optional<tickmark::v1::ClientClock> Clock(SessionTime /*now*/) const {
    return std::nullopt;
  }
};

// Receives committed records in sequence order (subscribers).
class RecordSink {
 public:
  virtual ~RecordSink() = default;
  // Called on the ledger writer thread; must not block.
  virtual void OnCommitted(const std::vector<tickmark::v1::Record>& records) = 0;
};

class SessionRuntime {
 public:
  SessionRuntime(const ledger::SessionRow& row, const MonotonicSource* mono,
                 ledger::Ledger* ledger);

  const std::string& id() const { return id_; }
  SessionTime Now() const { return clock_.Now(); }
  bool open() const;

  using AckCallback = std::function<void(const tickmark::v1::Ack&)>;
  // Appends a feedback or step record; deduplicates by (client id, client
  // sequence). `done` runs exactly once: when the record (or, for a
  // duplicate, the original) is committed or has failed, on the ledger
  // thread or, if the ledger fails synchronously, on the caller's. Acks
  // carry the committed sequence, never the provisional one Append returns.
  // Copies of one (client id, client sequence) sent concurrently are stored
  // once; the others are answered as duplicates of it.
  void AppendClientRecord(tickmark::v1::Record record, AckCallback done);
  // Appends any other record. `done` may be empty.
  absl::StatusOr<uint64_t> AppendRecord(
      tickmark::v1::Record record,
      std::function<void(const absl::Status&, const tickmark::v1::Record&)> done = {});
  // Highest client sequence stored (or in flight) for this client id.
  absl::StatusOr<uint64_t> LastClientSequence(const std::string& client_id);

  void AddStream(StreamHandle* stream);
  void RemoveStream(StreamHandle* stream);
  size_t StreamCount();
  // The clock of every stream that has one, at Now(), ordered by client id.
  std::vector<tickmark::v1::ClientClock> Clocks();
  void AddSink(RecordSink* sink);
  void RemoveSink(RecordSink* sink);

  // How late a record may arrive and still be credited (fixed at creation).
  Duration allowed_lateness() const;
  // The session default kernel's canonical text (its KernelSetting record's
  // description); empty until that record was seen.
  std::string default_kernel() const;
  // Session.pin_kernels: no calibration is applied to trainers joining.
  bool pin_kernels() const { return pin_kernels_; }
  // Whether a KernelSetting for this trainer has been committed (or claimed
  // by ClaimAutoKernel) in this session.
  bool HasKernelFor(const std::string& trainer) const;
  // Claims the one automatic (calibration) kernel setting of a trainer in
  // this session: true once, and only while HasKernelFor is false.
  bool ClaimAutoKernel(const std::string& trainer);

  // Feeds the credit engine with everything the ledger holds for this
  // session and writes the derived records that are missing (after a
  // restart). Call once, before the runtime is shared.
  absl::Status Rebuild();

  // Settles every step as of `end_ns` and appends the final derived records
  // (call after MarkClosed and a ledger flush, before the "closed" record).
  absl::Status FinishCredit(int64_t end_ns);

  // Marks the session closed and ends every stream with `why`.
  void MarkClosed(const absl::Status& why);
  // Ends every stream (and subscriber) with `why`; the session stays open
  // (its lease moved to another instance).
  void EndStreams(const absl::Status& why);
  // Ends the streams that use this token.
  void EndStreamsOf(const std::string& token_id, const absl::Status& why);

 private:
  // One (client id, client sequence) being looked up or stored. It owns the
  // key until it finishes, so a copy that arrives meanwhile waits on it
  // instead of being stored a second time.
  struct PendingClientRecord {
    std::vector<AckCallback> copies;  // answered when this one finishes
    bool finished = false;            // GUARDED_BY(mu_)
  };
  // Per client id: what is known about its sequence numbers.
  struct ClientSeqState {
    bool loaded = false;        // highest was read from the ledger
    uint64_t highest = 0;       // highest client sequence stored or in flight
    // Client seq -> the record that owns it, until committed or failed.
    std::map<uint64_t, std::shared_ptr<PendingClientRecord>> in_flight;
  };
  // Releases `pending`'s key and returns the copies to answer; nullopt if it
  // finished already (a ledger may both call back and return an error).
  std::optional<std::vector<AckCallback>> FinishPending(
      const std::string& client_id, uint64_t cseq,
      const std::shared_ptr<PendingClientRecord>& pending);
  // Answers the original (if `done`) and its copies, with no lock held.
  void AnswerPending(const std::string& client_id, uint64_t cseq,
                     const std::shared_ptr<PendingClientRecord>& pending, const AckCallback& done,
                     const tickmark::v1::Ack& ack);
  void Fanout(const absl::Status& status, const std::vector<tickmark::v1::Record>& records);
  // Feeds committed input records to the credit engine and appends what it
  // derives. Runs on the ledger thread, in sequence order.
  void Credit(const std::vector<tickmark::v1::Record>& records);
  void NoteKernel(const tickmark::v1::Record& r);

  const std::string id_;
  const SessionClock clock_;
  ledger::Ledger* const ledger_;  // not owned

  mutable std::mutex mu_;
  bool open_;                                      // GUARDED_BY(mu_)
  std::map<std::string, ClientSeqState> clients_;  // GUARDED_BY(mu_)

  std::mutex credit_mu_;
  CreditDriver credit_;             // GUARDED_BY(credit_mu_)
  std::atomic<int64_t> lateness_ns_{0};  // from the session's default kernel record
  mutable std::mutex kernel_mu_;
  std::string default_kernel_;      // GUARDED_BY(kernel_mu_)
  std::set<std::string> kernel_trainers_;  // GUARDED_BY(kernel_mu_): set or claimed
  const bool pin_kernels_;

  std::mutex streams_mu_;
  std::set<StreamHandle*> streams_;  // GUARDED_BY(streams_mu_)
  std::set<RecordSink*> sinks_;      // GUARDED_BY(streams_mu_)
};

// What a session made under a study (docs/studies.md) stores: the condition
// and participants, and the allowed lateness recorded in its default kernel
// record (0: the server's).
struct SessionStudyPart {
  std::string condition;
  std::vector<std::string> participants;
  int64_t allowed_lateness_ns = 0;
};

// All sessions of the server. Thread-safe.
class SessionHub {
 public:
  struct Options {
    // Kernel of new sessions that name none.
    DelayKernel default_kernel = *DelayKernel::Uniform(Duration::Millis(200), Duration::Millis(4000));
    Duration allowed_lateness = Duration::Seconds(2);
    // Signs a receipt when a session closes (docs/audit.md); null: none.
    std::shared_ptr<const audit::ReceiptKey> receipt_key;
  };
  SessionHub(ledger::Ledger* ledger, const MonotonicSource* mono, int64_t (*utc_now_ns)(),
             Options options);
  ~SessionHub();

  // The runtime of a session, loaded from the ledger on first use.
  // NOT_FOUND for an unknown session. With several instances on one
  // database, loading takes the session's lease: UNAVAILABLE ("served by
  // another instance at ADDR") while another instance holds it, and
  // OwnerHint then names that address.
  absl::StatusOr<std::shared_ptr<SessionRuntime>> Get(const std::string& id);
  // The runtime of a session if it is loaded already, else null. Unlike Get
  // this never loads (loading replays the ledger into the credit engine).
  std::shared_ptr<SessionRuntime> Find(const std::string& id);
  // Creates and opens a session anchored to UTC now, with `kernel` (text
  // form; empty: the server default) as its default delay kernel;
  // `pin_kernels` as in SessionRuntime::pin_kernels.
  // `study_part` (sessions made under a study, docs/studies.md): see
  // SessionStudyPart.
  using StudyPart = SessionStudyPart;
  absl::StatusOr<std::shared_ptr<SessionRuntime>> Create(const std::string& title,
                                                         const std::string& study,
                                                         const std::string& kernel = "",
                                                         bool pin_kernels = false,
                                                         const StudyPart& study_part = {});
  // Closes a session: records the event, ends its streams, and stores the
  // close receipt signed with options.receipt_key (if any).
  absl::Status Close(const std::string& id);
  // Time on the server's own timeline (for tokens of no session).
  int64_t UtcNowNanos() const { return utc_now_ns_(); }
  ledger::Ledger* ledger() const { return ledger_; }
  // Where the session's owner is reached, when another instance owns it
  // (as last learned: a refused Get or a lost lease); "" if unknown.
  std::string OwnerHint(const std::string& id);
  // Subscribers here to a session another instance owns: woken (an empty
  // OnCommitted) when the database says records of it were committed.
  void Watch(const std::string& id, RecordSink* sink);
  void Unwatch(const std::string& id, RecordSink* sink);

 private:
  void NoteLease(const std::string& id, const ledger::SessionLease& lease);
  void OnLeaseLost(const std::string& id, const std::string& owner);
  absl::Status NotOwnedError(const std::string& id, const std::string& owner);

  ledger::Ledger* const ledger_;
  const MonotonicSource* const mono_;
  int64_t (*const utc_now_ns_)();
  const std::string boot_id_;  // this boot's kernel id
  const Options options_;

  std::mutex mu_;
  std::map<std::string, std::shared_ptr<SessionRuntime>> sessions_;  // GUARDED_BY(mu_)
  std::map<std::string, std::string> owners_;  // GUARDED_BY(mu_): session -> owner address
  std::mutex watch_mu_;  // a leaf: sinks' OnCommitted only posts
  std::map<std::string, std::set<RecordSink*>> watchers_;  // GUARDED_BY(watch_mu_)
};

// The kernel's boot id (/proc/sys/kernel/random/boot_id), or "" if unknown.
std::string ReadBootId();
// CLOCK_REALTIME in nanoseconds.
int64_t SystemUtcNowNanos();

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_SESSION_HUB_H_

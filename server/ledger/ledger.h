// tickmark::ledger — the append-only, persisted record of every session
// (docs/architecture.md §6).
//
// The ledger owns two things that must never disagree with what is on disk:
// each session's sequence numbers and its hash chain. Append() assigns
// consecutive sequence numbers in call order and hands the records to a
// single writer, which commits them in that order (group commit) and only
// then reports them, so a caller that acknowledges on the commit callback
// never acknowledges something a crash could lose.
//
// Hash chain: record.hash = SHA-256(previous record's hash || body), where
// body is the deterministic serialisation of the record with its hash field
// empty; the first record of a session chains from 32 zero bytes. In chain
// version 2 (every session created since) a record's personal fields are
// cleared from the body and enter it only as a salted digest (SealPersonal);
// the salt and the personal content are kept beside the record so that they
// can be erased (docs/audit.md, "Erasure").
//
// Thread safety: every method may be called from any thread. Commit
// callbacks run on the writer thread, in commit order; they must be quick
// and must not call Append/Barrier/Flush for the same ledger synchronously
// while holding locks the caller of Append holds.
#ifndef TICKMARK_SERVER_LEDGER_LEDGER_H_
#define TICKMARK_SERVER_LEDGER_LEDGER_H_

#include <cstdint>
#include <functional>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::ledger {

// A session's row; the anchors let session time continue across restarts.
struct SessionRow {
  std::string id;
  std::string title;
  std::string study;
  bool open = true;
  int64_t opened_session_ns = 0;
  int64_t closed_session_ns = 0;  // 0 while open
  int64_t utc_anchor_ns = 0;      // session time at the monotonic anchor
  int64_t mono_anchor_ns = 0;     // CLOCK_MONOTONIC reading at the anchor
  std::string boot_id;            // kernel boot id the monotonic reading belongs to
  uint64_t last_sequence = 0;     // highest committed sequence (filled on read)
  // Trainers credit with the session's kernels only: a calibrated trainer
  // joining does not get their calibration (Session.pin_kernels).
  bool pin_kernels = false;
  // "session", or "study": the row of a study's journal (docs/studies.md).
  // A study's records are appended, chained and read exactly like a
  // session's, keyed by the study id; GetSession and ListSessions never
  // return study rows (ListStudies and GetStudy do).
  std::string kind = "session";
  // Sessions created under a study (Session.condition, .participants).
  std::string condition;
  std::vector<std::string> participants;
  // How the session's records are chained (Session.chain_version): 1, the
  // whole record is hashed; 2, personal fields enter only as a salted digest.
  uint32_t chain_version = 1;
};

// The chain version of new sessions.
constexpr uint32_t kChainVersion = 2;

// A record's personal content as kept beside it in chain version 2 (table
// `personal`): the serialised PersonalContent and the random salt of its
// digest. Erasing a participant deletes these.
struct PersonalPart {
  std::string participant;  // the trainer pseudonym
  std::string salt;         // 32 random bytes
  std::string content;      // PersonalContent, deterministic serialisation
};

// A session whose personal content of one participant was erased, and how
// much (EraseParticipant below).
struct PersonalHolding {
  std::string session_id;
  bool open = false;
  uint32_t chain_version = 1;
  std::vector<uint64_t> sequences;  // records holding the participant's content
};

// A calibration as the server-wide index (table `calibration`) lists it; the
// full Calibration is its record's body.
struct CalibrationRow {
  std::string id;  // "c-7f3a2c91"
  std::string trainer;
  std::string session_id;  // where it was measured
  uint64_t sequence = 0;   // its Calibration record there
  int64_t created_session_ns = 0;
  std::string family;  // the chosen family
  std::string kernel_description;
  uint32_t valid = 0;
  bool warning = false;
  tickmark::v1::SourceKind source_kind = tickmark::v1::SOURCE_KIND_UNSPECIFIED;
};

// A derived time set (table `time_set`): a session's event times recomputed
// after the fact (`tickmark retime`), stored beside the originals, which are
// never changed. Outside the session's hash chain, like a replay's derived
// set; through_sequence and head_hash name the journal state it came from.
struct TimeSetRow {
  std::string id;  // "ts-7f3a2c91"
  std::string session_id;
  std::string created_utc;  // set by the ledger ("2026-01-02T03:04:05.678Z")
  std::string method;       // "two-sided probe bounds"
  std::string parameters;   // JSON object of the method's settings
  uint64_t through_sequence = 0;  // computed from records 1..through_sequence
  std::string head_hash;          // that record's hash, 32 raw bytes
  uint64_t events = 0;            // derived_time rows
  uint64_t retimed = 0;           // of which recomputed (the rest kept their live time)
};

// One event time of a time set (table `derived_time`).
struct DerivedTimeRow {
  uint64_t sequence = 0;  // the feedback or step record
  std::string kind;       // "feedback", "step_start" or "step_end"
  std::string client_id;
  int64_t event_session_ns = 0;
  int64_t uncertainty_ns = 0;
  int64_t live_session_ns = 0;      // as the record holds it
  int64_t live_uncertainty_ns = 0;
  std::string outcome;  // "retimed", or why the live time was kept
  uint32_t probes = 0;  // probes that bounded it
};

// A token as stored: only the SHA-256 of the secret is kept.
struct TokenRow {
  std::string id;          // public id, e.g. "t-1a2b3c4d"
  std::string session_id;  // empty: the server-wide operator token
  tickmark::v1::Role role = tickmark::v1::ROLE_UNSPECIFIED;
  std::string subject;     // trainer pseudonym / agent name
  std::string hash;        // 32 raw bytes
  int64_t issued_session_ns = 0;
  bool revoked = false;
};

struct RecordCounts {
  uint64_t feedback = 0;
  uint64_t steps = 0;
  uint64_t probes = 0;
  uint64_t markers = 0;
  uint64_t clients = 0;
  uint64_t late = 0;
  uint64_t unmatched = 0;
  uint64_t rejected_probes = 0;
  uint64_t sync_pulses = 0;  // SyncPulse records (0 where a backend does not count them)
};

// Called on the writer thread once a batch is durable (status OK) or has
// failed. `records` are the caller's records with sequence and hash filled.
using CommitCallback =
    std::function<void(const absl::Status& status, const std::vector<tickmark::v1::Record>& records)>;

// Several instances on one database (docs/architecture.md, "More than one
// machine"): the right to write a session, held by one instance at a time.
struct SessionLease {
  bool owned = true;          // this instance may write the session now
  std::string owner_address;  // not owned: where clients reach the owner
  uint64_t token = 0;         // the fencing token held (0: a ledger without leases)
};

class Ledger {
 public:
  virtual ~Ledger() = default;

  // Session and token changes are synchronous: durable when they return.
  virtual absl::Status CreateSession(const SessionRow& row) = 0;
  virtual absl::StatusOr<SessionRow> GetSession(std::string_view id) = 0;
  virtual absl::StatusOr<std::vector<SessionRow>> ListSessions(bool include_closed) = 0;
  virtual absl::Status CloseSession(std::string_view id, int64_t closed_session_ns) = 0;
  // Moves a session's time anchor (after a reboot reset the monotonic clock).
  virtual absl::Status ReanchorSession(std::string_view id, int64_t utc_anchor_ns,
                                       int64_t mono_anchor_ns, std::string_view boot_id) = 0;

  virtual absl::Status PutToken(const TokenRow& row) = 0;
  // NOT_FOUND if no token has this hash.
  virtual absl::StatusOr<TokenRow> FindTokenByHash(std::string_view hash) = 0;
  virtual absl::StatusOr<std::vector<TokenRow>> ListTokens(std::string_view session_id) = 0;
  virtual absl::StatusOr<TokenRow> RevokeToken(std::string_view session_id,
                                               std::string_view token_id) = 0;

  // Assigns the next sequence numbers of `session_id` to `records` (in
  // order), queues them for the writer and returns the first one assigned.
  // `done` runs after the commit. The sequence returned is provisional: if
  // an earlier append of the same session fails, its sequences are given
  // to the appends after it so that the session's chain has no hole; `done`
  // always receives the records as committed. The records' session_id, sequence and hash
  // are filled by the ledger; everything else is the caller's.
  virtual absl::StatusOr<uint64_t> Append(std::string_view session_id,
                                          std::vector<tickmark::v1::Record> records,
                                          CommitCallback done) = 0;
  // Runs `done` (on the writer thread) once everything appended before this
  // call is committed.
  virtual void Barrier(std::function<void()> done) = 0;
  // Blocks until everything appended before this call is committed.
  virtual absl::Status Flush() = 0;

  // Committed records of a session with sequence >= from, in order, at most
  // `max`. Reads never block the writer (WAL).
  virtual absl::StatusOr<std::vector<tickmark::v1::Record>> Read(std::string_view session_id,
                                                                 uint64_t from, size_t max) = 0;
  // The session sequence of the committed record a client sent with this
  // client sequence, if any.
  virtual absl::StatusOr<std::optional<uint64_t>> FindClientSequence(std::string_view session_id,
                                                                     std::string_view client_id,
                                                                     uint64_t client_sequence) = 0;
  // Highest committed client sequence of this client (0 if none).
  virtual absl::StatusOr<uint64_t> LastClientSequence(std::string_view session_id,
                                                      std::string_view client_id) = 0;
  virtual absl::StatusOr<RecordCounts> Counts(std::string_view session_id) = 0;
  // Highest committed sequence of a session (0 if none).
  virtual uint64_t CommittedSequence(std::string_view session_id) = 0;

  // The CalibrationEvent records (moves and answers) of one calibration run
  // of one client in a session, committed ones only, in sequence order.
  virtual absl::StatusOr<std::vector<tickmark::v1::Record>> ReadCalibrationEvents(
      std::string_view session_id, std::string_view client_id, std::string_view run) = 0;
  // The server's calibrations, newest first (by created_session_ns, then
  // id); only `trainer`'s when it is not empty.
  virtual absl::StatusOr<std::vector<CalibrationRow>> ListCalibrations(
      std::string_view trainer) = 0;
  // One calibration's record (its body is the full Calibration); NOT_FOUND
  // for an unknown id.
  virtual absl::StatusOr<tickmark::v1::Record> GetCalibration(std::string_view id) = 0;
  // The newest calibration of a trainer, if any.
  virtual absl::StatusOr<std::optional<tickmark::v1::Record>> LatestCalibration(
      std::string_view trainer) = 0;

  // Stores a derived set (credit, label and unmatched records computed by a
  // replay) under `name`, with `spec` describing how it was made. The
  // session's records are not touched. ALREADY_EXISTS unless overwrite.
  virtual absl::Status PutDerivedSet(std::string_view session_id, std::string_view name,
                                     std::string_view spec,
                                     const std::vector<tickmark::v1::Record>& records,
                                     bool overwrite) = 0;

  // Stores a time set and its rows in one transaction (synchronous, like
  // PutDerivedSet); the session's records are not touched. ALREADY_EXISTS
  // for an id in use. The default (for ledgers without time sets) is
  // UNIMPLEMENTED, as for the readers below.
  virtual absl::Status PutTimeSet(const TimeSetRow& set, const std::vector<DerivedTimeRow>& times);
  // A session's time sets, newest first.
  virtual absl::StatusOr<std::vector<TimeSetRow>> ListTimeSets(std::string_view session_id);
  // One time set; NOT_FOUND for an unknown id.
  virtual absl::StatusOr<TimeSetRow> GetTimeSet(std::string_view id);
  // A time set's rows, by record sequence and kind.
  virtual absl::StatusOr<std::vector<DerivedTimeRow>> ReadDerivedTimes(std::string_view time_set);

  // Studies: rows of kind "study" (made with CreateSession), by creation
  // time; NOT_FOUND for an unknown study id. The default (for ledgers without
  // studies) is UNIMPLEMENTED.
  virtual absl::StatusOr<std::vector<SessionRow>> ListStudies();
  virtual absl::StatusOr<SessionRow> GetStudy(std::string_view id);
  // Audit (docs/audit.md). The defaults return UNIMPLEMENTED.
  // Stores a session's close receipt (one per session; replaced if present).
  virtual absl::Status PutReceipt(const tickmark::v1::Receipt& receipt,
                                  std::string_view public_key_pem);
  // A session's receipt, if it has one.
  virtual absl::StatusOr<std::optional<tickmark::v1::Receipt>> GetReceipt(
      std::string_view session_id);
  // Every session holding personal content of `participant` still kept
  // (chain version 2), and the sessions of chain version 1 holding records
  // of that trainer (sequences empty: those cannot be erased).
  virtual absl::StatusOr<std::vector<PersonalHolding>> FindPersonalContent(
      std::string_view participant);
  // Deletes the personal content of `participant` in these sessions (rows of
  // `personal`, and the same fields in the typed tables), then removes every
  // copy from the file (secure_delete, VACUUM, WAL checkpoint TRUNCATE).
  // The caller has appended the Erasure records first. Synchronous.
  virtual absl::Status ErasePersonalContent(std::string_view participant,
                                            const std::vector<std::string>& session_ids);

  // Whether writes succeed now: OK, or the reason they are failing (for
  // example RESOURCE_EXHAUSTED "ledger disk full: ..." while the disk is
  // full). Shown to operators (session show, health) and in the log; a
  // failing ledger recovers by itself when the cause is gone. While it is
  // not OK, appends still return a sequence but their commit callbacks get
  // this status (promptly: nothing waits for the disk).
  virtual absl::Status WriteHealth() { return absl::OkStatus(); }

  // Takes (or keeps) the write lease of a session. While another instance
  // holds an unexpired lease, answers owned = false with its address. The
  // default (a ledger only one process writes: SQLite) is always owned.
  virtual absl::StatusOr<SessionLease> AcquireSession(std::string_view /*session_id*/) {
    return SessionLease{};
  }
  // Called (on a ledger thread, with no ledger lock held) when this instance
  // lost a session's lease: another instance took it (`owner_address`), or
  // a write found the fencing token changed. Appends of that session fail
  // UNAVAILABLE until AcquireSession succeeds again. Set before appending.
  virtual void SetLeaseLostHandler(
      std::function<void(const std::string& session_id, const std::string& owner_address)>) {}
  // Called when records of a session were committed by any instance (the
  // database's notifications), with the highest sequence known; lets
  // subscribers on an instance that does not own the session wake. The
  // default never calls it.
  virtual void SetRemoteCommitHandler(
      std::function<void(const std::string& session_id, uint64_t sequence)>) {}

  // Commits what is queued, stops the writer and closes the database.
  // Appends after Close fail with UNAVAILABLE.
  virtual void Close() = 0;
};

// Short lowercase name of a record's kind ("feedback", "step", ...); also
// the `kind` column of the record table.
std::string_view RecordKindName(const tickmark::v1::Record& record);
tickmark::v1::RecordKind RecordKindOf(const tickmark::v1::Record& record);

// The client id and client sequence a record carries (feedback, steps,
// calibration events, and a calibration: its finish message's key), if any.
std::optional<std::pair<std::string, uint64_t>> ClientKeyOf(const tickmark::v1::Record& record);

// The bytes stored as a record's body and hashed: its deterministic
// serialisation with the hash field empty, and, when it holds a personal
// digest (chain version 2), with its personal fields empty. INTERNAL if it cannot be
// serialised (never an empty or partial body).
absl::StatusOr<std::string> CanonicalBody(const tickmark::v1::Record& record);

// Chain version 2: moves nothing, but computes the digest of the record's
// personal content (Feedback value/input/audio_sha256; a calibration
// answer's approve/detail) under a fresh random salt, sets the record's
// personal_digest and returns the part to keep beside it. nullopt for a
// record without personal content (or already sealed). The record keeps its
// personal fields in memory; CanonicalBody leaves them out once sealed.
absl::StatusOr<std::optional<PersonalPart>> SealPersonal(tickmark::v1::Record* record);
// Puts a record's personal content (PersonalPart::content) back into it.
// DATA_LOSS if the content does not parse.
absl::Status RestorePersonal(tickmark::v1::Record* record, std::string_view content);
// SHA-256(salt || content): the digest a sealed record holds.
absl::StatusOr<std::string> PersonalDigest(std::string_view salt, std::string_view content);
// The digest a record holds (empty if none).
std::string_view PersonalDigestOf(const tickmark::v1::Record& record);

// SHA-256(prev_hash || CanonicalBody(record)); see the header comment.
// INTERNAL if OpenSSL fails: a failure is an error, never a wrong hash.
absl::StatusOr<std::string> ChainHash(std::string_view prev_hash,
                                      const tickmark::v1::Record& record);

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_LEDGER_H_

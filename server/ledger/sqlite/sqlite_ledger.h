// The embedded ledger: one SQLite file in WAL mode.
//
// One writer thread owns the only writing connection. Appends are queued and
// committed in batches (group commit): the writer takes everything queued,
// commits it in one transaction, then runs the commit callbacks. Session and
// token changes go through the same writer so there is never a second
// writing connection; they return once committed.
//
// Batch isolation: each Append group is inserted under its own SAVEPOINT. A
// group that breaks a constraint (a duplicate client key that slipped past
// the server's dedup, say) is rolled back alone and only its callback gets
// the error; the session's later appends take over its sequences, so the
// chain stays gap-free.
//
// Failure state: a storage error (disk full, I/O error) rolls back the whole
// transaction; every group in it gets the error and the sessions' chains
// are re-assigned from their last committed record. The ledger then fails
// appends promptly (their callbacks get WriteHealth()) and the writer
// retries with backoff until a write succeeds again, when it resumes by
// itself. On a full disk the reserve file (<ledger>.reserve) is deleted
// first, so that the ledger_event row saying "write_failing" always commits
// and a clean shutdown has room; WAL checkpoints are off while failing so
// that they cannot eat that space. Transitions are logged and reported to
// Options::on_write_health.
//
// Start-up (Open) refuses, with a message naming the file and the way out:
// a damaged ledger (PRAGMA quick_check), a missing or empty ledger where one
// existed (unless allow_new_ledger), and a ledger that lacks committed
// records according to the side file <ledger>.heads (unless
// accept_lost_records). See startup_checks.h and heads_file.h.
//
// Durability: with synchronous=NORMAL (the default) a committed transaction
// survives the process being killed; with synchronous=FULL it also survives
// power loss, at a large cost per transaction (SQLite documentation, "WAL
// mode" and "PRAGMA synchronous").
//
// Thread safety: all public methods are thread-safe (see ledger.h).
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_SQLITE_LEDGER_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_SQLITE_LEDGER_H_

#include <chrono>
#include <condition_variable>
#include <deque>
#include <map>
#include <memory>
#include <mutex>
#include <string>
#include <thread>
#include <vector>

#include "server/ledger/ledger.h"
#include "server/ledger/sqlite/checkpointer.h"
#include "server/ledger/sqlite/heads_file.h"
#include "server/ledger/sqlite/reserve_file.h"

struct sqlite3;

namespace tickmark::ledger {

class ReadConnection;
class Statement;
class TypedTables;

class SqliteLedger final : public Ledger {
 public:
  struct Options {
    std::string path;                 // the database file; created if missing
    bool synchronous_full = false;    // FULL instead of NORMAL (see above)
    size_t max_batch_records = 4096;  // most records one transaction takes
    // Start a new, empty ledger even though `evidence_files` or the side file
    // show that one existed here (the operator's explicit choice).
    bool allow_new_ledger = false;
    // Start although the side file shows committed records the ledger lacks
    // (logged, and noted in ledger_event).
    bool accept_lost_records = false;
    // Files whose presence shows that a ledger existed (the operator token).
    // <path>.heads and <path>-wal always count.
    std::vector<std::string> evidence_files;
    // Size of <path>.reserve; 0 turns the reserve off.
    uint64_t reserve_bytes = 4 << 20;
    // PRAGMA quick_check at start stops (with a warning) after this long.
    std::chrono::milliseconds quick_check_limit{60'000};
    // Retries while writes fail: first after retry_initial, doubling up to
    // retry_max.
    std::chrono::milliseconds retry_initial{100};
    std::chrono::milliseconds retry_max{5'000};
    // Called on the writer thread on each change of WriteHealth().
    std::function<void(const absl::Status&)> on_write_health;
    // WAL sizes (pages) for the Checkpointer: where the writer finishes a
    // nearly copied WAL so it starts again, and where it checkpoints inline.
    int wal_restart_pages = Checkpointer::kDefaultRestartPages;
    int wal_backstop_pages = Checkpointer::kDefaultBackstopPages;
  };

  // Checks, opens (creating if allowed) and migrates the database, starts the
  // writer. The refusals are described above.
  static absl::StatusOr<std::unique_ptr<SqliteLedger>> Open(const Options& options);
  ~SqliteLedger() override;

  absl::Status CreateSession(const SessionRow& row) override;
  absl::StatusOr<SessionRow> GetSession(std::string_view id) override;
  absl::StatusOr<std::vector<SessionRow>> ListSessions(bool include_closed) override;
  absl::StatusOr<SessionRow> GetStudy(std::string_view id) override;
  absl::StatusOr<std::vector<SessionRow>> ListStudies() override;
  absl::Status CloseSession(std::string_view id, int64_t closed_session_ns) override;
  absl::Status ReanchorSession(std::string_view id, int64_t utc_anchor_ns, int64_t mono_anchor_ns,
                               std::string_view boot_id) override;
  absl::Status PutToken(const TokenRow& row) override;
  absl::StatusOr<TokenRow> FindTokenByHash(std::string_view hash) override;
  absl::StatusOr<std::vector<TokenRow>> ListTokens(std::string_view session_id) override;
  absl::StatusOr<TokenRow> RevokeToken(std::string_view session_id,
                                       std::string_view token_id) override;
  absl::StatusOr<uint64_t> Append(std::string_view session_id,
                                  std::vector<tickmark::v1::Record> records,
                                  CommitCallback done) override;
  void Barrier(std::function<void()> done) override;
  absl::Status Flush() override;
  absl::StatusOr<std::vector<tickmark::v1::Record>> Read(std::string_view session_id, uint64_t from,
                                                         size_t max) override;
  absl::StatusOr<std::optional<uint64_t>> FindClientSequence(std::string_view session_id,
                                                             std::string_view client_id,
                                                             uint64_t client_sequence) override;
  absl::StatusOr<uint64_t> LastClientSequence(std::string_view session_id,
                                              std::string_view client_id) override;
  absl::StatusOr<RecordCounts> Counts(std::string_view session_id) override;
  uint64_t CommittedSequence(std::string_view session_id) override;
  absl::StatusOr<std::vector<tickmark::v1::Record>> ReadCalibrationEvents(
      std::string_view session_id, std::string_view client_id, std::string_view run) override;
  absl::StatusOr<std::vector<CalibrationRow>> ListCalibrations(std::string_view trainer) override;
  absl::StatusOr<tickmark::v1::Record> GetCalibration(std::string_view id) override;
  absl::StatusOr<std::optional<tickmark::v1::Record>> LatestCalibration(
      std::string_view trainer) override;
  absl::Status PutDerivedSet(std::string_view session_id, std::string_view name,
                             std::string_view spec,
                             const std::vector<tickmark::v1::Record>& records,
                             bool overwrite) override;
  absl::Status PutTimeSet(const TimeSetRow& set, const std::vector<DerivedTimeRow>& times) override;
  absl::StatusOr<std::vector<TimeSetRow>> ListTimeSets(std::string_view session_id) override;
  absl::StatusOr<TimeSetRow> GetTimeSet(std::string_view id) override;
  absl::StatusOr<std::vector<DerivedTimeRow>> ReadDerivedTimes(std::string_view time_set) override;
  absl::Status PutReceipt(const tickmark::v1::Receipt& receipt,
                          std::string_view public_key_pem) override;
  absl::StatusOr<std::optional<tickmark::v1::Receipt>> GetReceipt(
      std::string_view session_id) override;
  absl::StatusOr<std::vector<PersonalHolding>> FindPersonalContent(
      std::string_view participant) override;
  absl::Status ErasePersonalContent(std::string_view participant,
                                    const std::vector<std::string>& session_ids) override;
  absl::Status WriteHealth() override;
  void Close() override;

  // WAL checkpoints run so far (Checkpointer), and the frames they copied:
  // by its thread, by the writer.
  struct WalCheckpoints {
    uint64_t background = 0, writer = 0;
    uint64_t background_frames = 0, writer_frames = 0;
  };
  WalCheckpoints wal_checkpoints() const {
    return checkpointer_
               ? WalCheckpoints{checkpointer_->background_runs(), checkpointer_->writer_runs(),
                                checkpointer_->background_frames(), checkpointer_->writer_frames()}
               : WalCheckpoints{};
  }

  // Where the side file and the reserve file live for a ledger at `path`.
  static std::string HeadsPath(const std::string& path) { return path + ".heads"; }
  static std::string ReservePath(const std::string& path) { return path + ".reserve"; }

 private:
  // One unit of work for the writer: records to insert, or a synchronous
  // operation, or a barrier.
  struct Work {
    std::string session_id;
    std::vector<tickmark::v1::Record> records;
    // Chain version 2: each record's personal part (nullopt: none), stored
    // beside it in table `personal`.
    std::vector<std::optional<PersonalPart>> personal;
    CommitCallback done;                        // for records
    absl::Status error;                         // set: fail the records with it, do not insert
    std::function<absl::Status(sqlite3*)> op;   // for synchronous changes
    std::function<void(absl::Status)> op_done;  // result of op
    std::function<void()> barrier;              // for barriers
    bool outside_transaction = false;           // op runs without BEGIN/COMMIT (VACUUM)
  };

  SqliteLedger(Options options, sqlite3* writer);
  absl::Status LoadHeads();
  absl::Status CheckSideFile();
  void WriterLoop();
  void RunOp(Work& w);
  // Commits the record groups batch[begin, end) (one transaction, one
  // savepoint each) and runs their callbacks.
  void CommitGroups(std::vector<Work>& batch, size_t begin, size_t end);
  // Gives the session's records that are not committed yet — batch[from..]
  // and everything queued — sequences and hashes that continue from `head`.
  void RechainLocked(const std::string& session, const SessionHead& head, std::vector<Work>& batch,
                     size_t from);
  // The failure state: entered on a storage error, left by TryRecover.
  // Rewrites the side file if commits changed the heads since it was last
  // written and it is due (every batch under synchronous=FULL; else when
  // `force`d (a flush, closing) or kHeadsInterval after the last rewrite).
  // Writer thread only.
  void WriteHeadsIfDue(bool force);
  // Runs one statement of fixed text (BEGIN, SAVEPOINT, RELEASE, COMMIT)
  // from a prepared statement kept for the connection. Writer thread only.
  absl::Status ExecCached(const char* sql);
  void EnterFailing(const absl::Status& cause);
  void TryRecover();
  absl::Status NoteLedgerEvent(const char* event, const std::string& detail);
  void SetHealth(absl::Status health);
  absl::Status RunSync(std::function<absl::Status(sqlite3*)> op, bool outside_transaction = false);

  const Options options_;
  sqlite3* writer_db_;                     // used only on the writer thread (and in Open/Close)
  std::unique_ptr<ReadConnection> reads_;  // the reading side (its own connection)
  std::unique_ptr<Checkpointer> checkpointer_;  // WAL checkpoints off the writer thread
  HeadsFile heads_file_;                        // writer thread only (after Open)
  ReserveFile reserve_;                         // writer thread only (after Open)
  std::unique_ptr<TypedTables> tables_;         // writer thread only
  std::map<std::string, std::unique_ptr<Statement>> cached_;  // writer thread only (ExecCached)

  std::mutex mu_;
  std::condition_variable work_cv_;  // signalled when queue_ grows or closing_
  std::deque<Work> queue_;           // GUARDED_BY(mu_)
  SessionHeads assigned_;            // GUARDED_BY(mu_): last sequence handed out
  SessionHeads committed_;           // GUARDED_BY(mu_): last sequence committed
  std::map<std::string, uint32_t, std::less<>> chain_versions_;  // GUARDED_BY(mu_): per session
  bool closing_ = false;                                         // GUARDED_BY(mu_)
  absl::Status health_;                                          // GUARDED_BY(mu_): WriteHealth()
  std::chrono::steady_clock::time_point next_retry_;     // writer thread only, while failing
  std::chrono::milliseconds backoff_{0};                 // writer thread only, while failing
  std::chrono::steady_clock::time_point failing_since_;  // writer thread only
  bool heads_dirty_ = false;  // writer thread: committed_ changed since the side file was written
  std::chrono::steady_clock::time_point heads_written_at_;  // writer thread only
  std::thread writer_;                                      // runs WriterLoop
};

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_SQLITE_LEDGER_H_

// The embedded ledger: one SQLite file in WAL mode (design.md §3, §6).
//
// One writer thread owns the only writing connection. Appends are queued and
// committed in batches (group commit): the writer takes everything queued,
// commits it in one transaction, then runs the commit callbacks. Session and
// token changes go through the same writer so there is never a second
// writing connection; they return once committed.
//
// Durability: with synchronous=NORMAL (the default) a committed transaction
// survives the process being killed; with synchronous=FULL it also survives
// power loss, at a large cost per transaction (SQLite documentation, "WAL
// mode" and "PRAGMA synchronous").
//
// Thread safety: all public methods are thread-safe (see ledger.h).
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_SQLITE_LEDGER_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_SQLITE_LEDGER_H_

#include <condition_variable>
#include <deque>
#include <map>
#include <memory>
#include <mutex>
#include <string>
#include <thread>

#include "server/ledger/ledger.h"

struct sqlite3;

namespace tickmark::ledger {

class Stmt;

class SqliteLedger final : public Ledger {
 public:
  struct Options {
    std::string path;              // the database file; created if missing
    bool synchronous_full = false;  // FULL instead of NORMAL (see above)
    size_t max_batch_records = 4096;  // most records one transaction takes
  };

  // Opens (creating if needed) and migrates the database, starts the writer.
  static absl::StatusOr<std::unique_ptr<SqliteLedger>> Open(const Options& options);
  ~SqliteLedger() override;

  absl::Status CreateSession(const SessionRow& row) override;
  absl::StatusOr<SessionRow> GetSession(std::string_view id) override;
  absl::StatusOr<std::vector<SessionRow>> ListSessions(bool include_closed) override;
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
  absl::StatusOr<std::vector<tickmark::v1::Record>> Read(std::string_view session_id,
                                                         uint64_t from, size_t max) override;
  absl::StatusOr<std::optional<uint64_t>> FindClientSequence(std::string_view session_id,
                                                             std::string_view client_id,
                                                             uint64_t client_sequence) override;
  absl::StatusOr<uint64_t> LastClientSequence(std::string_view session_id,
                                              std::string_view client_id) override;
  absl::StatusOr<RecordCounts> Counts(std::string_view session_id) override;
  uint64_t CommittedSequence(std::string_view session_id) override;
  absl::Status PutDerivedSet(std::string_view session_id, std::string_view name,
                             std::string_view spec,
                             const std::vector<tickmark::v1::Record>& records,
                             bool overwrite) override;
  void Close() override;

 private:
  // One unit of work for the writer: records to insert, or a synchronous
  // operation, or a barrier.
  struct Work {
    std::string session_id;
    std::vector<tickmark::v1::Record> records;
    CommitCallback done;                            // for records
    std::function<absl::Status(sqlite3*)> op;       // for synchronous changes
    std::function<void(absl::Status)> op_done;      // result of op
    std::function<void()> barrier;                  // for barriers
  };
  // Where a session's chain stands (assigned, maybe not yet committed).
  struct Chain {
    uint64_t next_sequence = 1;
    std::string last_hash = std::string(32, '\0');
  };

  SqliteLedger(Options options, sqlite3* writer, sqlite3* reader);
  absl::Status LoadChains();
  void WriterLoop();
  absl::Status RunSync(std::function<absl::Status(sqlite3*)> op);
  absl::Status InsertRecord(const tickmark::v1::Record& record);
  // Inserts a credit, label or unmatched row of derived set `set`.
  absl::Status InsertDerivedRow(std::string_view set, uint64_t seq,
                                const tickmark::v1::Record& record);
  struct Statements;
  // A cached prepared statement on the writer connection (writer thread only).
  Stmt& Prepared(const char* sql);

  const Options options_;
  sqlite3* writer_db_;  // used only on the writer thread (and in Open/Close)
  std::mutex read_mu_;        // serialises use of reader_db_
  sqlite3* reader_db_;  // GUARDED_BY(read_mu_)

  std::mutex mu_;
  std::condition_variable work_cv_;             // signalled when queue_ grows or closing_
  std::deque<Work> queue_;                      // GUARDED_BY(mu_)
  std::map<std::string, Chain, std::less<>> chains_;         // GUARDED_BY(mu_)
  std::map<std::string, uint64_t, std::less<>> committed_;   // GUARDED_BY(mu_)
  bool closing_ = false;                        // GUARDED_BY(mu_)
  absl::Status failed_;                         // GUARDED_BY(mu_): sticky write failure
  std::thread writer_;                          // runs WriterLoop
  std::unique_ptr<Statements> statements_;      // writer thread only
};

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_SQLITE_LEDGER_H_

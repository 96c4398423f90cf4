// The PostgreSQL ledger (`tickmarkd --ledger postgresql://...`): the same
// contract as the SQLite ledger (ledger.h), on a database server several
// tickmarkd instances can share.
//
// Writing: one writer thread owns one connection. Appends are queued,
// committed in batches (group commit: everything queued goes into one
// transaction; if an Append group breaks a constraint, the batch is redone
// with each group under its own SAVEPOINT so the bad group is undone alone)
// and acknowledged from the commit callback, after COMMIT returned. Sequence numbers and the hash
// chain (ChainHash) are assigned at Append, as in SQLite, from the session's head as this instance
// knows it.
//
// Leases (Options::leases): a session is written by one instance at a time.
// AcquireSession takes the session's row in `session_lease` when it is free,
// expired or already ours, raising its fencing token whenever the owner
// changes, and reloads the session's head from the database. Every write
// transaction first runs `UPDATE session_lease SET expires_at = ... WHERE
// session_id = $1 AND owner = $me AND token = $held`: if that touches no row
// the lease was taken over, nothing of that session is written, its
// appends fail UNAVAILABLE and the lease-lost handler runs. The row lock
// that update takes orders the writer against an instance taking the lease
// over, so a paused old owner cannot write after losing it; a writer
// paused inside a transaction is cut off by the server
// (idle_in_transaction_session_timeout = the lease), so it cannot hold the
// row forever either. A renewer thread extends the leases every third of
// the lease time. Lease times are the database's clock.
//
// Notifications: each commit sends NOTIFY tickmark_records with
// "<sequence> <session id>"; a listener thread (own connection) passes them
// to the remote-commit handler so subscribers anywhere can wake.
//
// Failures: a broken connection or a storage error fails the transaction's
// groups (UNAVAILABLE "ledger write failed: ...", RESOURCE_EXHAUSTED for a
// full disk); the writer then reconnects with backoff (WriteHealth() says
// why meanwhile, appends fail promptly). A COMMIT whose outcome is unknown
// is resolved by reloading the sessions' heads from the database: records
// that did commit are found by the server's dedup when clients resend.
//
// Thread safety: all public methods are thread-safe.
#ifndef TICKMARK_SERVER_LEDGER_POSTGRES_POSTGRES_LEDGER_H_
#define TICKMARK_SERVER_LEDGER_POSTGRES_POSTGRES_LEDGER_H_

#include <chrono>
#include <condition_variable>
#include <deque>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <set>
#include <string>
#include <thread>
#include <vector>

#include "server/ledger/ledger.h"

namespace tickmark::ledger {

namespace pg {
class PgConn;
}

class PostgresLedger final : public Ledger {
 public:
  struct Options {
    std::string conninfo;             // postgresql://user@host:port/db?... or key=value pairs
    size_t max_batch_records = 4096;  // most records one transaction takes
    // Leases: off, the ledger writes any session (one process, tests of the
    // ledger alone); on, sessions must be acquired first (tickmarkd).
    bool leases = false;
    std::string instance_id;  // unique per process; default host:pid:random
    std::string advertise;    // host:port clients reach this instance at
    std::chrono::milliseconds lease{5'000};
    // Retries while writes fail: first after retry_initial, doubling up to retry_max.
    std::chrono::milliseconds retry_initial{100};
    std::chrono::milliseconds retry_max{5'000};
    std::function<void(const absl::Status&)> on_write_health;
  };

  // Connects, applies the migrations (FAILED_PRECONDITION for a newer
  // schema) and starts the writer, renewer and listener threads.
  static absl::StatusOr<std::unique_ptr<PostgresLedger>> Open(const Options& options);
  ~PostgresLedger() override;

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
  absl::Status WriteHealth() override;
  absl::StatusOr<SessionLease> AcquireSession(std::string_view session_id) override;
  void SetLeaseLostHandler(
      std::function<void(const std::string&, const std::string&)> handler) override;
  void SetRemoteCommitHandler(std::function<void(const std::string&, uint64_t)> handler) override;
  void Close() override;

  const std::string& instance_id() const { return options_.instance_id; }

 private:
  struct Head {
    uint64_t sequence = 0;
    std::string hash;  // 32 raw bytes; empty before the first record
  };
  using Heads = std::map<std::string, Head, std::less<>>;
  struct Work {
    std::string session_id;
    std::vector<tickmark::v1::Record> records;
    CommitCallback done;
    absl::Status error;             // set: fail the records with it
    std::function<void()> barrier;  // for barriers
  };

  explicit PostgresLedger(Options options);
  void WriterLoop();
  // One transaction for the batch. First without savepoints (two round
  // trips fewer per append); if an append breaks a constraint, everything
  // is rolled back and done again with a savepoint per append, so that only
  // that one fails.
  void CommitGroups(std::vector<Work>& batch, bool savepoints = false);
  void RechainLocked(const std::string& session, const Head& head, std::vector<Work>& batch,
                     size_t from);
  absl::Status InsertRecord(const tickmark::v1::Record& r, uint64_t token);
  absl::StatusOr<Head> LoadHead(pg::PgConn* conn, std::string_view session_id);
  void EnterFailing(const absl::Status& cause);
  void TryRecover();
  void SetHealth(absl::Status health);
  void RenewLoop();
  void ListenLoop();
  void LeaseLost(const std::string& session, const std::string& owner_address);
  // Runs `fn` on the read (or ops) connection under its mutex, reconnecting
  // once if the connection broke.
  template <typename T>
  T OnConn(std::unique_ptr<pg::PgConn>& conn, std::mutex& mu,
           const std::function<T(pg::PgConn*)>& fn);
  // A synchronous change in its own transaction on the ops connection.
  absl::Status RunTx(const std::function<absl::Status(pg::PgConn*)>& op);

  const Options options_;
  std::unique_ptr<pg::PgConn> writer_;  // writer thread only
  std::mutex read_mu_;
  std::unique_ptr<pg::PgConn> reader_;  // GUARDED_BY(read_mu_)
  std::mutex ops_mu_;
  std::unique_ptr<pg::PgConn> ops_;  // GUARDED_BY(ops_mu_): sync changes, leases

  std::mutex mu_;
  std::condition_variable work_cv_;
  std::deque<Work> queue_;                              // GUARDED_BY(mu_)
  Heads assigned_;                                      // GUARDED_BY(mu_)
  Heads committed_;                                     // GUARDED_BY(mu_)
  std::map<std::string, uint64_t, std::less<>> owned_;  // GUARDED_BY(mu_): session -> token
  bool closing_ = false;                                // GUARDED_BY(mu_)
  absl::Status health_;                                 // GUARDED_BY(mu_)
  std::function<void(const std::string&, const std::string&)> on_lease_lost_;  // GUARDED_BY(mu_)
  std::function<void(const std::string&, uint64_t)> on_remote_commit_;         // GUARDED_BY(mu_)
  std::chrono::steady_clock::time_point next_retry_;                           // writer thread only
  std::chrono::milliseconds backoff_{0};                                       // writer thread only
  std::chrono::steady_clock::time_point failing_since_;                        // writer thread only

  std::condition_variable stop_cv_;  // renewer and listener wait on it (with mu_)
  std::thread writer_thread_;
  std::thread renewer_thread_;
  std::thread listener_thread_;
};

// True for a --ledger value that names a PostgreSQL database.
bool IsPostgresUrl(std::string_view ledger);

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_POSTGRES_POSTGRES_LEDGER_H_

// The ledger's reading side: its own SQLite connection, so that reads see
// committed data and never wait for the writer (WAL readers do not block
// the writer, nor it them).
//
// Ownership: owns the connection and closes it when destroyed. Thread
// safety: every method may be called from any thread; a mutex serialises
// use of the one connection.
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_READ_CONNECTION_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_READ_CONNECTION_H_

#include <mutex>
#include <optional>
#include <string_view>
#include <vector>

#include "server/ledger/ledger.h"

struct sqlite3;

namespace tickmark::ledger {

class ReadConnection {
 public:
  explicit ReadConnection(sqlite3* db);
  ~ReadConnection();
  ReadConnection(const ReadConnection&) = delete;
  ReadConnection& operator=(const ReadConnection&) = delete;

  // The same contracts as the Ledger methods of the same names.
  absl::StatusOr<SessionRow> GetSession(std::string_view id);
  absl::StatusOr<std::vector<SessionRow>> ListSessions(bool include_closed);
  absl::StatusOr<SessionRow> GetStudy(std::string_view id);
  absl::StatusOr<std::vector<SessionRow>> ListStudies();
  absl::StatusOr<TokenRow> FindTokenByHash(std::string_view hash);
  absl::StatusOr<std::vector<TokenRow>> ListTokens(std::string_view session_id);
  absl::StatusOr<TokenRow> FindToken(std::string_view token_id);
  absl::StatusOr<std::vector<tickmark::v1::Record>> Read(std::string_view session_id,
                                                         uint64_t from, size_t max);
  absl::StatusOr<std::optional<uint64_t>> FindClientSequence(std::string_view session_id,
                                                             std::string_view client_id,
                                                             uint64_t client_sequence);
  absl::StatusOr<uint64_t> LastClientSequence(std::string_view session_id,
                                              std::string_view client_id);
  absl::StatusOr<RecordCounts> Counts(std::string_view session_id);
  absl::StatusOr<std::vector<tickmark::v1::Record>> ReadCalibrationEvents(
      std::string_view session_id, std::string_view client_id, std::string_view run);
  absl::StatusOr<std::vector<CalibrationRow>> ListCalibrations(std::string_view trainer);
  absl::StatusOr<tickmark::v1::Record> GetCalibration(std::string_view id);
  absl::StatusOr<std::optional<tickmark::v1::Record>> LatestCalibration(std::string_view trainer);
  absl::StatusOr<std::vector<TimeSetRow>> ListTimeSets(std::string_view session_id);
  absl::StatusOr<TimeSetRow> GetTimeSet(std::string_view id);
  absl::StatusOr<std::vector<DerivedTimeRow>> ReadDerivedTimes(std::string_view time_set);
  absl::StatusOr<std::optional<tickmark::v1::Receipt>> GetReceipt(std::string_view session_id);
  absl::StatusOr<std::vector<PersonalHolding>> FindPersonalContent(std::string_view participant);

  // Whether closing this connection may checkpoint the WAL (off while
  // writes fail for lack of space; see SqliteLedger).
  void SetCheckpointOnClose(bool on);
  // Closes the connection now; later reads fail with UNAVAILABLE.
  void Close();

 private:
  absl::StatusOr<SessionRow> GetSessionRow(std::string_view id, std::string_view kind);
  absl::StatusOr<std::vector<SessionRow>> ListSessionRows(std::string_view where);
  std::mutex mu_;  // serialises use of db_
  sqlite3* db_;    // GUARDED_BY(mu_)
};

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_READ_CONNECTION_H_

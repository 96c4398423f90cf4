// A prepared SQLite statement with chained binds, and the two helpers every
// SQLite caller here needs: turning the connection's last error into an
// absl::Status, and running a few statements without results.
//
// Ownership: a Statement belongs to the connection it was prepared on and is
// finalised when destroyed; it must not outlive that connection. Not
// thread-safe: use it on the thread that owns the connection.
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_STATEMENT_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_STATEMENT_H_

#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"

struct sqlite3;
struct sqlite3_stmt;

namespace tickmark::ledger {

// The connection's last error as a Status. The code says what a caller may
// do about it: RESOURCE_EXHAUSTED for a full disk (SQLITE_FULL),
// UNAVAILABLE for I/O, lock and open errors (retry later), DATA_LOSS for a
// damaged file (SQLITE_CORRUPT, SQLITE_NOTADB), ALREADY_EXISTS for a
// constraint, INTERNAL for the rest.
absl::Status SqlError(sqlite3* db, std::string_view what);

// True for errors that concern the whole database (disk, I/O, damage) rather
// than the one statement that hit them.
bool IsStorageError(const absl::Status& status);

// Runs statements that return no rows.
absl::Status Exec(sqlite3* db, const char* sql);

// A JSON array of these strings, built by SQLite's own JSON functions (no
// escaping of ours; columns read it back with json_each).
absl::StatusOr<std::string> JsonStringArray(sqlite3* db, const std::vector<std::string>& items);

class Statement {
 public:
  Statement(sqlite3* db, const char* sql);
  ~Statement();
  Statement(const Statement&) = delete;
  Statement& operator=(const Statement&) = delete;

  // Not OK if preparing failed; every other call is then a no-op.
  const absl::Status& status() const { return status_; }
  // Ready for new binds (bind indexes start again at 1).
  Statement& Reset();

  Statement& Bind(int64_t v);
  Statement& Bind(uint64_t v) { return Bind(static_cast<int64_t>(v)); }
  Statement& Bind(int v) { return Bind(static_cast<int64_t>(v)); }
  Statement& Bind(bool v) { return Bind(static_cast<int64_t>(v ? 1 : 0)); }
  Statement& Bind(double v);
  Statement& Bind(std::string_view v);
  Statement& Bind(const std::string& v) { return Bind(std::string_view(v)); }
  Statement& Bind(const char* v) { return Bind(std::string_view(v)); }
  Statement& BindBlob(std::string_view v);
  Statement& BindNull();
  // Binds NULL for 0 (optional times and sequences).
  Statement& BindOptional(int64_t v) { return v == 0 ? BindNull() : Bind(v); }

  // SQLITE_ROW -> true, SQLITE_DONE -> false, error -> status.
  absl::StatusOr<bool> Step();
  absl::Status Run();

  int64_t Int(int col) const;
  double Real(int col) const;
  bool IsNull(int col) const;
  std::string Text(int col) const;
  std::string Blob(int col) const;

 private:
  sqlite3* db_;                   // the connection it was prepared on
  sqlite3_stmt* stmt_ = nullptr;  // null if preparing failed
  absl::Status status_;           // why preparing failed
  int next_ = 1;                  // index of the next Bind
};

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_STATEMENT_H_

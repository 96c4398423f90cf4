// A small read helper over raw SQLite for the audit tools (internal to
// server/audit): open a file read-only, run a query, read columns.
#ifndef TICKMARK_SERVER_AUDIT_SQLITE_FILE_H_
#define TICKMARK_SERVER_AUDIT_SQLITE_FILE_H_

#include <sqlite3.h>

#include <memory>
#include <string>
#include <string_view>

#include "absl/status/statusor.h"
#include "server/base/strings.h"

namespace tickmark::audit {

// An open SQLite connection, closed when it goes.
struct DbClose {
  void operator()(sqlite3* db) const { sqlite3_close(db); }
};
using Db = std::unique_ptr<sqlite3, DbClose>;

// One prepared statement; not thread-safe.
class Query {
 public:
  Query(sqlite3* db, std::string_view sql) : db_(db) {
    if (sqlite3_prepare_v2(db, sql.data(), static_cast<int>(sql.size()), &stmt_, nullptr) !=
        SQLITE_OK) {
      error_ = absl::InvalidArgumentError(Cat("SQLite: ", sqlite3_errmsg(db)));
    }
  }
  ~Query() { sqlite3_finalize(stmt_); }
  Query(const Query&) = delete;
  Query& operator=(const Query&) = delete;

  Query& Bind(std::string_view text) {
    if (stmt_)
      sqlite3_bind_text(stmt_, ++bound_, text.data(), static_cast<int>(text.size()),
                        SQLITE_TRANSIENT);
    return *this;
  }
  Query& BindBlob(std::string_view bytes) {
    if (stmt_)
      sqlite3_bind_blob(stmt_, ++bound_, bytes.data(), static_cast<int>(bytes.size()),
                        SQLITE_TRANSIENT);
    return *this;
  }
  Query& Bind(int64_t v) {
    if (stmt_) sqlite3_bind_int64(stmt_, ++bound_, v);
    return *this;
  }
  // true: a row; false: done.
  absl::StatusOr<bool> Step() {
    if (!error_.ok()) return error_;
    int rc = sqlite3_step(stmt_);
    if (rc == SQLITE_ROW) return true;
    if (rc == SQLITE_DONE) return false;
    return absl::DataLossError(Cat("SQLite: ", sqlite3_errmsg(db_)));
  }
  int64_t Int(int col) const { return sqlite3_column_int64(stmt_, col); }
  bool IsNull(int col) const { return sqlite3_column_type(stmt_, col) == SQLITE_NULL; }
  std::string Blob(int col) const {
    const void* p = sqlite3_column_blob(stmt_, col);
    int n = sqlite3_column_bytes(stmt_, col);
    return p ? std::string(static_cast<const char*>(p), static_cast<size_t>(n)) : std::string();
  }
  std::string Text(int col) const { return Blob(col); }

 private:
  sqlite3* db_;
  sqlite3_stmt* stmt_ = nullptr;
  int bound_ = 0;
  absl::Status error_;
};

// Runs statements that return no rows.
inline absl::Status ExecSql(sqlite3* db, const std::string& sql) {
  char* err = nullptr;
  if (sqlite3_exec(db, sql.c_str(), nullptr, nullptr, &err) != SQLITE_OK) {
    std::string msg = err ? err : "unknown error";
    sqlite3_free(err);
    return absl::UnavailableError(Cat("SQLite: ", msg));
  }
  return absl::OkStatus();
}

// Whether `table` has a column `column` (false for a missing table).
inline bool HasColumn(sqlite3* db, const std::string& table, const std::string& column) {
  Query q(db, Cat("SELECT 1 FROM pragma_table_info('", table, "') WHERE name = '", column, "'"));
  auto row = q.Step();
  return row.ok() && *row;
}

}  // namespace tickmark::audit

#endif  // TICKMARK_SERVER_AUDIT_SQLITE_FILE_H_

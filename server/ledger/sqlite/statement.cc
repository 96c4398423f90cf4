#include "server/ledger/sqlite/statement.h"

#include <sqlite3.h>

#include "server/base/strings.h"

namespace tickmark::ledger {

absl::Status SqlError(sqlite3* db, std::string_view what) {
  const int code = sqlite3_errcode(db) & 0xff;
  std::string msg = Cat(what, ": ", sqlite3_errmsg(db));
  switch (code) {
    case SQLITE_FULL:
      return absl::ResourceExhaustedError(msg);
    case SQLITE_IOERR:
    case SQLITE_BUSY:
    case SQLITE_LOCKED:
    case SQLITE_CANTOPEN:
    case SQLITE_READONLY:
    case SQLITE_NOMEM:
    case SQLITE_PROTOCOL:
      return absl::UnavailableError(msg);
    case SQLITE_CORRUPT:
    case SQLITE_NOTADB:
      return absl::DataLossError(msg);
    case SQLITE_CONSTRAINT:
      return absl::AlreadyExistsError(msg);
    default:
      return absl::InternalError(msg);
  }
}

bool IsStorageError(const absl::Status& status) {
  return absl::IsResourceExhausted(status) || absl::IsUnavailable(status) ||
         absl::IsDataLoss(status);
}

absl::Status Exec(sqlite3* db, const char* sql) {
  char* err = nullptr;
  if (sqlite3_exec(db, sql, nullptr, nullptr, &err) != SQLITE_OK) {
    sqlite3_free(err);
    return SqlError(db, Cat("sqlite ", std::string_view(sql).substr(0, 40)));
  }
  return absl::OkStatus();
}

Statement::Statement(sqlite3* db, const char* sql) : db_(db) {
  if (sqlite3_prepare_v3(db, sql, -1, SQLITE_PREPARE_PERSISTENT, &stmt_, nullptr) != SQLITE_OK) {
    status_ = SqlError(db, Cat("prepare ", std::string_view(sql).substr(0, 60)));
    sqlite3_finalize(stmt_);
    stmt_ = nullptr;
  }
}

Statement::~Statement() { sqlite3_finalize(stmt_); }

Statement& Statement::Reset() {
  sqlite3_reset(stmt_);
  sqlite3_clear_bindings(stmt_);
  next_ = 1;
  return *this;
}

Statement& Statement::Bind(int64_t v) {
  sqlite3_bind_int64(stmt_, next_++, v);
  return *this;
}

Statement& Statement::Bind(double v) {
  sqlite3_bind_double(stmt_, next_++, v);
  return *this;
}

Statement& Statement::Bind(std::string_view v) {
  sqlite3_bind_text(stmt_, next_++, v.data(), static_cast<int>(v.size()), SQLITE_TRANSIENT);
  return *this;
}

Statement& Statement::BindBlob(std::string_view v) {
  sqlite3_bind_blob(stmt_, next_++, v.data(), static_cast<int>(v.size()), SQLITE_TRANSIENT);
  return *this;
}

Statement& Statement::BindNull() {
  sqlite3_bind_null(stmt_, next_++);
  return *this;
}

absl::StatusOr<bool> Statement::Step() {
  if (stmt_ == nullptr) return status_;
  const int rc = sqlite3_step(stmt_);
  if (rc == SQLITE_ROW) return true;
  if (rc == SQLITE_DONE) return false;
  return SqlError(db_, "step");
}

absl::Status Statement::Run() {
  auto r = Step();
  return r.ok() ? absl::OkStatus() : r.status();
}

int64_t Statement::Int(int col) const { return sqlite3_column_int64(stmt_, col); }
double Statement::Real(int col) const { return sqlite3_column_double(stmt_, col); }
bool Statement::IsNull(int col) const { return sqlite3_column_type(stmt_, col) == SQLITE_NULL; }

std::string Statement::Text(int col) const {
  const unsigned char* p = sqlite3_column_text(stmt_, col);
  return p ? std::string(reinterpret_cast<const char*>(p),
                         static_cast<size_t>(sqlite3_column_bytes(stmt_, col)))
           : std::string();
}

std::string Statement::Blob(int col) const {
  const void* p = sqlite3_column_blob(stmt_, col);
  return p ? std::string(static_cast<const char*>(p),
                         static_cast<size_t>(sqlite3_column_bytes(stmt_, col)))
           : std::string();
}

absl::StatusOr<std::string> JsonStringArray(sqlite3* db, const std::vector<std::string>& items) {
  std::string json = "[]";
  // SQLite docs, JSON functions: json_insert with path '$[#]' appends.
  Statement q(db, "SELECT json_insert(?1, '$[#]', ?2)");
  for (const std::string& item : items) {
    auto row = q.Reset().Bind(json).Bind(item).Step();
    if (!row.ok()) return row.status();
    if (!*row) return absl::InternalError("json_insert returned no row");
    json = q.Text(0);
  }
  return json;
}

}  // namespace tickmark::ledger

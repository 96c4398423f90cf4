#include "server/audit/archive.h"

#include <filesystem>
#include <memory>
#include <vector>

#include "server/audit/sqlite_file.h"

namespace tickmark::audit {
namespace {

absl::Status Copy(const std::string& ledger_path, const std::string& session_id,
                  const std::string& out) {
  sqlite3* raw = nullptr;
  int rc = sqlite3_open_v2(ledger_path.c_str(), &raw, SQLITE_OPEN_READONLY, nullptr);
  Db src(raw);
  if (rc != SQLITE_OK) return absl::InvalidArgumentError(Cat("cannot open ", ledger_path));
  sqlite3_busy_timeout(raw, 5000);
  if (!HasColumn(raw, "record", "body")) {
    return absl::InvalidArgumentError(Cat(ledger_path, " is not a tickmark ledger"));
  }
  {
    Query q(raw, "SELECT 1 FROM session WHERE id = ?");
    q.Bind(session_id);
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) return absl::NotFoundError(Cat("no session '", session_id, "' in ", ledger_path));
  }
  raw = nullptr;
  rc = sqlite3_open_v2(out.c_str(), &raw, SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE, nullptr);
  Db dst(raw);
  if (rc != SQLITE_OK) return absl::UnavailableError(Cat("cannot create ", out));
  // SQLite docs, "Online Backup API": init, step(-1) copies every page in
  // one pass from a consistent read snapshot of the source, finish.
  sqlite3_backup* backup = sqlite3_backup_init(dst.get(), "main", src.get(), "main");
  if (backup == nullptr) {
    return absl::UnavailableError(Cat("backup of ", ledger_path, ": ", sqlite3_errmsg(dst.get())));
  }
  rc = sqlite3_backup_step(backup, -1);
  sqlite3_backup_finish(backup);
  if (rc != SQLITE_DONE) {
    return absl::UnavailableError(Cat("backup of ", ledger_path, ": ", sqlite3_errstr(rc)));
  }
  src.reset();
  sqlite3* d = dst.get();
  if (absl::Status s = ExecSql(d,
                               "PRAGMA journal_mode=DELETE; PRAGMA secure_delete=ON; "
                               "PRAGMA foreign_keys=OFF;");
      !s.ok()) {
    return s;
  }
  std::vector<std::string> tables;
  {
    Query q(d, "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'");
    while (true) {
      auto row = q.Step();
      if (!row.ok()) return row.status();
      if (!*row) break;
      tables.push_back(q.Text(0));
    }
  }
  if (absl::Status s = ExecSql(d, "BEGIN"); !s.ok()) return s;
  for (const std::string& t : tables) {
    std::string sql;
    if (t == "session") {
      sql = "DELETE FROM session WHERE id IS NOT ?1";
    } else if (t == "token" || t == "ledger_event") {
      sql = Cat("DELETE FROM \"", t, "\"");  // secrets' hashes and server notes stay home
    } else if (HasColumn(d, t, "session_id")) {
      sql = Cat("DELETE FROM \"", t, "\" WHERE session_id IS NOT ?1");
    } else {
      continue;  // schema_migrations and other server-wide tables without session rows
    }
    Query q(d, sql);
    if (sql.find("?1") != std::string::npos) q.Bind(session_id);
    auto done = q.Step();
    if (!done.ok()) {
      ExecSql(d, "ROLLBACK").IgnoreError();
      return done.status();
    }
  }
  if (absl::Status s = ExecSql(d, "COMMIT"); !s.ok()) return s;
  return ExecSql(d, "VACUUM");
}

}  // namespace

absl::Status ArchiveSession(const std::string& ledger_path, const std::string& session_id,
                            const std::string& out) {
  std::error_code ec;
  if (std::filesystem::exists(out, ec)) {
    return absl::AlreadyExistsError(Cat(out, " exists; give a new file name"));
  }
  if (!std::filesystem::is_regular_file(ledger_path, ec)) {
    return absl::NotFoundError(Cat("no ledger file ", ledger_path));
  }
  absl::Status s = Copy(ledger_path, session_id, out);
  if (!s.ok()) {
    std::filesystem::remove(out, ec);  // never leave a half-made archive
    std::filesystem::remove(out + "-journal", ec);
  }
  return s;
}

}  // namespace tickmark::audit

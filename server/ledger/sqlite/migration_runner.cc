#include "server/ledger/sqlite/migration_runner.h"

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/ledger/sqlite/migrations.h"
#include "server/ledger/sqlite/statement.h"

namespace tickmark::ledger {

absl::Status ApplyMigrations(sqlite3* db) {
  absl::Status s =
      Exec(db,
           "CREATE TABLE IF NOT EXISTS schema_migrations ("
           " version INTEGER PRIMARY KEY, description TEXT NOT NULL,"
           " applied_utc TEXT NOT NULL DEFAULT (strftime('%Y-%m-%dT%H:%M:%SZ','now')));");
  if (!s.ok()) return s;
  int64_t have = 0;
  {
    Statement q(db, "SELECT COALESCE(MAX(version), 0) FROM schema_migrations");
    auto row = q.Step();
    if (!row.ok()) return row.status();
    have = q.Int(0);
  }
  auto all = SqliteMigrations();
  if (have > static_cast<int64_t>(all.size())) {
    return absl::FailedPreconditionError(Cat("ledger schema version ", have,
                                             " is newer than this program knows (", all.size(),
                                             "); use a newer tickmarkd"));
  }
  for (const Migration& m : all) {
    if (m.version <= have) continue;
    if (s = Exec(db, "BEGIN IMMEDIATE"); !s.ok()) return s;
    s = Exec(db, m.sql);
    if (s.ok()) {
      Statement ins(db, "INSERT INTO schema_migrations (version, description) VALUES (?, ?)");
      s = ins.Bind(m.version).Bind(m.description).Run();
    }
    if (!s.ok()) {
      Exec(db, "ROLLBACK").IgnoreError();
      return absl::Status(s.code(), Cat("migration ", m.version, " failed: ", s.message()));
    }
    if (s = Exec(db, "COMMIT"); !s.ok()) return s;
    TM_LOG(kInfo) << "ledger schema migrated to version " << m.version << " (" << m.description
                  << ")";
  }
  return absl::OkStatus();
}

}  // namespace tickmark::ledger

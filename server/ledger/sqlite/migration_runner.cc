#include "server/ledger/sqlite/migration_runner.h"

#include <set>

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
  // The versions applied, not only the highest: the list may have gaps
  // (numbers are allocated to parallel work before it lands), and a version
  // below one already applied that arrives later is still applied.
  std::set<int64_t> applied;
  {
    Statement q(db, "SELECT version FROM schema_migrations");
    while (true) {
      auto row = q.Step();
      if (!row.ok()) return row.status();
      if (!*row) break;
      applied.insert(q.Int(0));
    }
  }
  auto all = SqliteMigrations();
  std::set<int64_t> known;
  for (const Migration& m : all) known.insert(m.version);
  for (int64_t v : applied) {
    if (known.count(v) == 0) {
      return absl::FailedPreconditionError(Cat("ledger schema version ", v,
                                               " is newer than this program knows (it knows ",
                                               *known.rbegin(), "); use a newer tickmarkd"));
    }
  }
  for (const Migration& m : all) {
    if (applied.count(m.version) > 0) continue;
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

#include "server/ledger/sqlite/migration_runner.h"

#include <algorithm>
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
  // Applied versions as a set: migrations are numbered by who added them
  // (branches merge in any order), so the known list may have gaps and a
  // lower number may arrive after a higher one was applied.
  std::set<int64_t> have;
  {
    Statement q(db, "SELECT version FROM schema_migrations");
    while (true) {
      auto row = q.Step();
      if (!row.ok()) return row.status();
      if (!*row) break;
      have.insert(q.Int(0));
    }
  }
  auto all = SqliteMigrations();
  int64_t newest_known = 0;
  for (const Migration& m : all) newest_known = std::max<int64_t>(newest_known, m.version);
  if (!have.empty() && *have.rbegin() > newest_known) {
    return absl::FailedPreconditionError(Cat("ledger schema version ", *have.rbegin(),
                                             " is newer than this program knows (", newest_known,
                                             "); use a newer tickmarkd"));
  }
  for (const Migration& m : all) {
    if (have.count(m.version) > 0) continue;
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

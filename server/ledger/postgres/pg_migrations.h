// The PostgreSQL ledger's schema: numbered migrations, applied in order by
// ApplyPgMigrations and listed in schema_migrations. Never edit a shipped
// migration; add the next one. Several instances may start at once: the
// runner holds a transaction-level advisory lock while it migrates.
#ifndef TICKMARK_SERVER_LEDGER_POSTGRES_PG_MIGRATIONS_H_
#define TICKMARK_SERVER_LEDGER_POSTGRES_PG_MIGRATIONS_H_

#include "absl/status/status.h"
#include "server/ledger/postgres/pg_conn.h"

namespace tickmark::ledger::pg {

// FAILED_PRECONDITION if the database has a newer schema than this program.
absl::Status ApplyPgMigrations(PgConn* conn);
// The highest migration this program knows.
int LatestPgMigration();

}  // namespace tickmark::ledger::pg

#endif  // TICKMARK_SERVER_LEDGER_POSTGRES_PG_MIGRATIONS_H_

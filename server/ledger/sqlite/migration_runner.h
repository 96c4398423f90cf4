// Brings a ledger database to the newest schema this program knows by
// applying the numbered migrations of migrations.h that it lacks, each in
// its own transaction, and refuses a database newer than this program.
//
// Thread safety: call with exclusive use of `db` (in SqliteLedger::Open).
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_MIGRATION_RUNNER_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_MIGRATION_RUNNER_H_

#include "absl/status/status.h"

struct sqlite3;

namespace tickmark::ledger {

// FAILED_PRECONDITION when the database's schema is newer than this program.
absl::Status ApplyMigrations(sqlite3* db);

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_MIGRATION_RUNNER_H_

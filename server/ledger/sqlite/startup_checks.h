// What SqliteLedger::Open checks before it serves anything, so that a
// damaged, empty, missing or truncated-by-lost-WAL ledger is refused with a
// message that names the file and the way out, instead of starting silently
// with records gone. Each check returns OK or the refusal (its message is
// written for the operator and shown as tickmarkd's start-up error).
//
// Thread safety: call from Open only (exclusive use of the connection).
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_STARTUP_CHECKS_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_STARTUP_CHECKS_H_

#include <chrono>
#include <string>
#include <vector>

#include "absl/status/status.h"
#include "server/ledger/sqlite/heads_file.h"

struct sqlite3;

namespace tickmark::ledger {

// Before the file is opened. A ledger that is missing or zero bytes long is
// refused (FAILED_PRECONDITION) when any of `evidence` exists (files that
// only a ledger that existed leaves behind: the heads file, the operator
// token, a -wal file) unless `allow_new`. Sets *is_new when the ledger will
// be created (or is empty) here, and *replaces_old when that happens over
// such evidence (allowed by `allow_new`).
absl::Status CheckLedgerPresence(const std::string& path, const std::vector<std::string>& evidence,
                                 bool allow_new, bool* is_new, bool* replaces_old);

// PRAGMA quick_check, stopped after `limit` (a warning is logged and the
// start goes on: a huge ledger is not refused for being slow to check);
// progress is logged every few seconds. DATA_LOSS naming the file and the
// recovery commands when the ledger is damaged.
absl::Status QuickCheck(sqlite3* db, const std::string& path, std::chrono::milliseconds limit);

// Compares the database file's size with the page count its own header
// states (SQLite file format §1.3: page size at offset 16, "in-header
// database size" at offset 28, valid when the change counter at offset 24
// equals the version-valid-for number at offset 92). A file cut short is
// DATA_LOSS with the recovery commands, even where PRAGMA quick_check reads
// only the pages that are left and says "ok". OK for a missing or empty file
// and for a header whose size field is not valid.
absl::Status CheckFileLength(const std::string& path);

// The refusal for a ledger SQLite cannot read at all (not a database,
// malformed), with the recovery commands.
absl::Status DamagedLedger(const std::string& path, const std::string& detail);

// Sessions whose head in the ledger is behind the side file (records lost)
// or differs from it at the side file's sequence (chain replaced), one line
// each: "session s-1: records 121..500 missing (ledger ends at 120)".
std::vector<std::string> CompareHeads(const SessionHeads& side, const SessionHeads& ledger);

// The refusal for CompareHeads' findings, naming the files and how to
// accept the loss explicitly.
absl::Status LostRecords(const std::string& path, const std::string& heads_path,
                         const std::vector<std::string>& findings);

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_STARTUP_CHECKS_H_

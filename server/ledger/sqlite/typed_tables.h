// Writes records into the ledger's tables: the `record` journal (the
// protobuf body and its chain hash, what readers replay and audits re-hash)
// and the typed table of the record's kind (one column per field, for SQL
// readers), plus the derived rows (credit, label, unmatched) of a replay.
//
// Ownership: borrows the writing connection and caches its prepared
// statements; destroy it before closing that connection. Not thread-safe:
// the ledger's writer thread is its only user. It runs inside the caller's
// transaction and never begins or ends one.
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_TYPED_TABLES_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_TYPED_TABLES_H_

#include <cstdint>
#include <map>
#include <memory>
#include <string>
#include <string_view>

#include "absl/status/status.h"
#include "server/ledger/ledger.h"
#include "tickmark/v1/records.pb.h"

struct sqlite3;

namespace tickmark::ledger {

class Statement;

class TypedTables {
 public:
  explicit TypedTables(sqlite3* db);
  ~TypedTables();
  TypedTables(const TypedTables&) = delete;
  TypedTables& operator=(const TypedTables&) = delete;

  // The record (session_id, sequence and hash filled) into the journal and
  // its typed table, and its personal part (chain version 2) into `personal`.
  absl::Status Insert(const tickmark::v1::Record& record, const PersonalPart* personal = nullptr);
  // A credit, label or unmatched row of derived set `set`, numbered `seq`
  // within the set.
  absl::Status InsertDerived(std::string_view set, uint64_t seq,
                             const tickmark::v1::Record& record);

 private:
  // The cached statement for `sql`, reset and ready for binds.
  Statement& Prepared(const char* sql);
  // The label's parts as a JSON array of {trainer, value, weight}, built by
  // SQLite's own json functions so that nothing here escapes text by hand.
  absl::Status LabelPartsJson(const tickmark::v1::Label& label, std::string* json);

  sqlite3* db_;                                              // borrowed writing connection
  std::map<std::string, std::unique_ptr<Statement>> cache_;  // by SQL text
};

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_TYPED_TABLES_H_

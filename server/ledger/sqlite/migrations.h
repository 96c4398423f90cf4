// Numbered schema migrations of the SQLite ledger.
//
// Migration N moves a database from schema N-1 to N. They are applied in
// order, each in its own transaction, and recorded in schema_migrations.
// Never edit a migration that has shipped: add the next one.
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_MIGRATIONS_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_MIGRATIONS_H_

#include <span>

namespace tickmark::ledger {

struct Migration {
  int version;              // 1, 2, 3, ... (gaps allowed; applied in list order)
  const char* description;  // one line, shown in schema_migrations
  const char* sql;          // statements run in one transaction
};

std::span<const Migration> SqliteMigrations();

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_MIGRATIONS_H_

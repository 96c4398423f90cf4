// The CSV tables of `tickmark export --format csv` and their codebook
// (docs/studies.md, "Export for analysis"): one table per record kind, each
// column with its type, unit, clock and meaning. Table-driven: a new record
// kind is one more CsvTable entry in csv_export.cc (its file name, its body
// case, its columns), and the writer, the codebook and the tests pick it up.
//
// Files are RFC 4180 CSV: a header row, comma-separated fields, fields with
// a comma, quote or line break in double quotes (quotes doubled), CRLF line
// ends, UTF-8. Numbers are shortest round-trip decimal; booleans 0/1;
// nanosecond times are integers (read them as int64: a double holds them
// exactly only up to 2^53 ns).
//
// Pure functions; thread-safe.
#ifndef TICKMARK_CLIENTS_CLI_CSV_EXPORT_H_
#define TICKMARK_CLIENTS_CLI_CSV_EXPORT_H_

#include <functional>
#include <string>
#include <vector>

#include "tickmark/v1/records.pb.h"

namespace tickmark::cli {

struct CsvColumn {
  std::string name;
  // "integer" (int64), "number" (float64), "string", "boolean" (0/1).
  std::string type;
  // "ns", "ppm", "s", "" (none).
  std::string unit;
  // For times: "session time", "source clock", "agent clock", "client clock";
  // "" for values that are no time.
  std::string clock;
  std::string meaning;
  std::function<std::string(const tickmark::v1::Record&)> value;
};

struct CsvTable {
  std::string file;  // "feedback.csv"
  tickmark::v1::Record::BodyCase body;
  tickmark::v1::RecordKind kind;
  std::string meaning;
  // Every table starts with session_id, sequence, written_session_ns.
  std::vector<CsvColumn> columns;
};

// Every exported table, in file order.
const std::vector<CsvTable>& CsvTables();

// The table of a record's kind, or null for kinds not exported as CSV.
const CsvTable* CsvTableFor(const tickmark::v1::Record& record);

// One field, quoted when RFC 4180 needs it.
std::string CsvField(const std::string& text);
// A row of fields joined with commas and ended with CRLF.
std::string CsvRow(const std::vector<std::string>& fields);
// A table's header row, and the row of one of its records.
std::string CsvHeader(const CsvTable& table);
std::string CsvRecordRow(const CsvTable& table, const tickmark::v1::Record& record);

// The codebook: a CSV with columns file, column, type, unit, clock, meaning;
// one row per column of every table.
std::string CsvCodebook();

}  // namespace tickmark::cli

#endif  // TICKMARK_CLIENTS_CLI_CSV_EXPORT_H_

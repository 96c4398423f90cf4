// A thin libpq wrapper for the PostgreSQL ledger: one connection, queries
// with parameters, results in binary format, errors as absl::Status.
//
// Parameters travel as text except bytea (binary); results come back in
// binary (libpq "resultFormat = 1"), so integers are read as network-order
// int8/int4 and bytea as raw bytes. SQL must therefore return BIGINT, INTEGER,
// BOOLEAN, DOUBLE PRECISION, TEXT or BYTEA columns (cast where needed).
//
// Error codes (PostgreSQL documentation, Appendix A "PostgreSQL Error Codes"):
// class 23 (integrity) -> ALREADY_EXISTS for 23505 unique_violation, else
// FAILED_PRECONDITION; 53100 disk_full and class 53 -> RESOURCE_EXHAUSTED;
// 40001/40P01 -> ABORTED; 55P03 lock_not_available, 57P01..57P03 and a broken
// connection -> UNAVAILABLE; anything else -> INTERNAL.
//
// Thread safety: a PgConn is used by one thread at a time.
#ifndef TICKMARK_SERVER_LEDGER_POSTGRES_PG_CONN_H_
#define TICKMARK_SERVER_LEDGER_POSTGRES_PG_CONN_H_

#include <cstdint>
#include <memory>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"

struct pg_conn;
struct pg_result;

namespace tickmark::ledger::pg {

class Params {
 public:
  Params& Text(std::string_view v);
  Params& Int(int64_t v);
  Params& UInt(uint64_t v) { return Int(static_cast<int64_t>(v)); }
  Params& Bool(bool v) { return Text(v ? "t" : "f"); }
  Params& Double(double v);
  Params& Bytes(std::string_view v);
  Params& Null();
  int size() const { return static_cast<int>(values_.size()); }

 private:
  friend class PgConn;
  std::vector<std::string> values_;
  std::vector<int> formats_;
  std::vector<bool> null_;
};

class Result {
 public:
  explicit Result(pg_result* r);
  int rows() const;
  bool IsNull(int row, int col) const;
  int64_t Int(int row, int col) const;  // int8, int4 or int2
  bool Bool(int row, int col) const;
  double Double(int row, int col) const;
  std::string Bytes(int row, int col) const;  // text or bytea, raw
  // Rows changed by an INSERT/UPDATE/DELETE.
  uint64_t affected() const;

 private:
  std::shared_ptr<pg_result> r_;
};

class PgConn {
 public:
  // Connects (conninfo: a postgresql:// URI or key=value pairs).
  static absl::StatusOr<std::unique_ptr<PgConn>> Connect(const std::string& conninfo);
  ~PgConn();
  absl::StatusOr<Result> Exec(std::string_view sql, const Params& params = Params());
  // Several statements without parameters (migrations, BEGIN, COMMIT...).
  absl::Status Run(std::string_view sql);
  bool ok() const;
  // Pipeline mode (libpq 14+, PostgreSQL docs "Pipeline Mode"): while on,
  // Exec only sends (its Result is empty) and EndPipeline collects every
  // statement's outcome: the first error, or OK. Run must not be used then.
  absl::Status BeginPipeline();
  absl::Status EndPipeline();
  pg_conn* raw() const { return conn_; }
  // The connection's socket (for LISTEN waits), -1 if broken.
  int socket() const;

 private:
  explicit PgConn(pg_conn* c) : conn_(c) {}
  pg_conn* conn_;
  bool pipelining_ = false;
};

// The conninfo without its password (for messages).
std::string Redacted(const std::string& conninfo);

}  // namespace tickmark::ledger::pg

#endif  // TICKMARK_SERVER_LEDGER_POSTGRES_PG_CONN_H_

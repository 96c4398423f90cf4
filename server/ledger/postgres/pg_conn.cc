#include "server/ledger/postgres/pg_conn.h"

#include <endian.h>
#include <libpq-fe.h>

#include <charconv>
#include <cmath>
#include <cstring>
#include <regex>

#include "server/base/strings.h"

namespace tickmark::ledger::pg {
namespace {

absl::Status StatusOf(PGconn* conn, const PGresult* r, std::string_view sql) {
  const char* state = r != nullptr ? PQresultErrorField(r, PG_DIAG_SQLSTATE) : nullptr;
  std::string msg = r != nullptr ? PQresultErrorMessage(r) : "";
  if (msg.empty() && conn != nullptr) msg = PQerrorMessage(conn);
  while (!msg.empty() && (msg.back() == '\n' || msg.back() == ' ')) msg.pop_back();
  std::string what = Cat("postgresql: ", msg);
  std::string code = state != nullptr ? state : "";
  (void)sql;
  if (conn != nullptr && PQstatus(conn) != CONNECTION_OK) return absl::UnavailableError(what);
  if (code == "23505") return absl::AlreadyExistsError(what);
  if (code.rfind("23", 0) == 0) return absl::FailedPreconditionError(what);
  if (code.rfind("53", 0) == 0) return absl::ResourceExhaustedError(what);
  if (code == "40001" || code == "40P01") return absl::AbortedError(what);
  if (code == "55P03" || code.rfind("57", 0) == 0 || code.rfind("08", 0) == 0 || code == "25P03") {
    return absl::UnavailableError(what);
  }
  if (code.empty()) return absl::UnavailableError(what);
  return absl::InternalError(what);
}

}  // namespace

Params& Params::Text(std::string_view v) {
  values_.emplace_back(v);
  formats_.push_back(0);
  null_.push_back(false);
  return *this;
}

Params& Params::Int(int64_t v) { return Text(std::to_string(v)); }

Params& Params::Double(double v) {
  if (std::isnan(v)) return Text("NaN");
  if (std::isinf(v)) return Text(v > 0 ? "Infinity" : "-Infinity");
  char buf[32];
  auto r = std::to_chars(buf, buf + sizeof buf, v);  // shortest round-trip text
  return Text(std::string_view(buf, static_cast<size_t>(r.ptr - buf)));
}

Params& Params::Bytes(std::string_view v) {
  values_.emplace_back(v);
  formats_.push_back(1);
  null_.push_back(false);
  return *this;
}

Params& Params::Null() {
  values_.emplace_back();
  formats_.push_back(0);
  null_.push_back(true);
  return *this;
}

Result::Result(pg_result* r) : r_(r, PQclear) {}
int Result::rows() const { return PQntuples(r_.get()); }
bool Result::IsNull(int row, int col) const { return PQgetisnull(r_.get(), row, col) != 0; }

int64_t Result::Int(int row, int col) const {
  if (IsNull(row, col)) return 0;
  const char* v = PQgetvalue(r_.get(), row, col);
  const int len = PQgetlength(r_.get(), row, col);
  if (len == 8) {
    uint64_t x;
    std::memcpy(&x, v, 8);
    return static_cast<int64_t>(be64toh(x));
  }
  if (len == 4) {
    uint32_t x;
    std::memcpy(&x, v, 4);
    return static_cast<int32_t>(be32toh(x));
  }
  if (len == 2) {
    uint16_t x;
    std::memcpy(&x, v, 2);
    return static_cast<int16_t>(be16toh(x));
  }
  if (len == 1) return v[0];
  return 0;
}

bool Result::Bool(int row, int col) const {
  return !IsNull(row, col) && PQgetvalue(r_.get(), row, col)[0] != 0;
}

double Result::Double(int row, int col) const {
  if (IsNull(row, col)) return 0;
  uint64_t x;
  std::memcpy(&x, PQgetvalue(r_.get(), row, col), 8);
  x = be64toh(x);
  double d;
  std::memcpy(&d, &x, 8);
  return d;
}

std::string Result::Bytes(int row, int col) const {
  if (IsNull(row, col)) return std::string();
  return std::string(PQgetvalue(r_.get(), row, col),
                     static_cast<size_t>(PQgetlength(r_.get(), row, col)));
}

uint64_t Result::affected() const {
  const char* n = PQcmdTuples(r_.get());
  return (n == nullptr || *n == '\0') ? 0 : std::strtoull(n, nullptr, 10);
}

absl::StatusOr<std::unique_ptr<PgConn>> PgConn::Connect(const std::string& conninfo) {
  PGconn* c = PQconnectdb(conninfo.c_str());
  if (c == nullptr) return absl::UnavailableError("postgresql: out of memory");
  if (PQstatus(c) != CONNECTION_OK) {
    std::string msg = PQerrorMessage(c);
    while (!msg.empty() && (msg.back() == '\n' || msg.back() == ' ')) msg.pop_back();
    PQfinish(c);
    return absl::UnavailableError(
        Cat("cannot connect to PostgreSQL at ", Redacted(conninfo), ": ", msg));
  }
  std::unique_ptr<PgConn> conn(new PgConn(c));
  // Quiet NOTICEs (CREATE ... IF NOT EXISTS and the like) go nowhere.
  PQsetNoticeProcessor(
      c, [](void*, const char*) {}, nullptr);
  return conn;
}

PgConn::~PgConn() {
  if (conn_ != nullptr) PQfinish(conn_);
}

bool PgConn::ok() const { return PQstatus(conn_) == CONNECTION_OK; }
int PgConn::socket() const { return PQsocket(conn_); }

absl::StatusOr<Result> PgConn::Exec(std::string_view sql, const Params& params) {
  std::vector<const char*> values(params.values_.size());
  std::vector<int> lengths(params.values_.size());
  for (size_t i = 0; i < params.values_.size(); ++i) {
    values[i] = params.null_[i] ? nullptr : params.values_[i].data();
    lengths[i] = static_cast<int>(params.values_[i].size());
  }
  const std::string text(sql);
  if (pipelining_) {
    if (PQsendQueryParams(conn_, text.c_str(), params.size(), nullptr, values.data(),
                          lengths.data(), params.formats_.data(), /*resultFormat=*/1) != 1) {
      return StatusOf(conn_, nullptr, sql);
    }
    return Result(nullptr);
  }
  PGresult* r = PQexecParams(conn_, text.c_str(), params.size(), nullptr, values.data(),
                             lengths.data(), params.formats_.data(), /*resultFormat=*/1);
  const ExecStatusType st = r != nullptr ? PQresultStatus(r) : PGRES_FATAL_ERROR;
  if (st != PGRES_COMMAND_OK && st != PGRES_TUPLES_OK) {
    absl::Status s = StatusOf(conn_, r, sql);
    if (r != nullptr) PQclear(r);
    return s;
  }
  return Result(r);
}

absl::Status PgConn::BeginPipeline() {
  if (PQenterPipelineMode(conn_) != 1) return StatusOf(conn_, nullptr, "pipeline");
  pipelining_ = true;
  return absl::OkStatus();
}

absl::Status PgConn::EndPipeline() {
  absl::Status first;
  if (PQpipelineSync(conn_) != 1) first = StatusOf(conn_, nullptr, "pipeline sync");
  while (first.ok() || PQstatus(conn_) == CONNECTION_OK) {
    PGresult* r = PQgetResult(conn_);
    if (r == nullptr) {
      if (PQstatus(conn_) != CONNECTION_OK) {
        if (first.ok()) first = StatusOf(conn_, nullptr, "pipeline");
        break;
      }
      continue;  // the end of one statement's results
    }
    const ExecStatusType st = PQresultStatus(r);
    if (st == PGRES_PIPELINE_SYNC) {
      PQclear(r);
      break;
    }
    if (st == PGRES_FATAL_ERROR && first.ok()) first = StatusOf(conn_, r, "pipeline");
    PQclear(r);  // PGRES_PIPELINE_ABORTED: skipped after the first error
  }
  pipelining_ = false;
  if (PQexitPipelineMode(conn_) != 1 && first.ok()) first = StatusOf(conn_, nullptr, "pipeline");
  return first;
}

absl::Status PgConn::Run(std::string_view sql) {
  const std::string text(sql);
  PGresult* r = PQexec(conn_, text.c_str());
  const ExecStatusType st = r != nullptr ? PQresultStatus(r) : PGRES_FATAL_ERROR;
  absl::Status s = (st == PGRES_COMMAND_OK || st == PGRES_TUPLES_OK) ? absl::OkStatus()
                                                                     : StatusOf(conn_, r, sql);
  if (r != nullptr) PQclear(r);
  return s;
}

std::string Redacted(const std::string& conninfo) {
  static const std::regex uri_password("(postgres(ql)?://[^:/@]*):[^@]*@");
  static const std::regex kv_password("password\\s*=\\s*\\S+");
  std::string out = std::regex_replace(conninfo, uri_password, "$1:***@");
  return std::regex_replace(out, kv_password, "password=***");
}

}  // namespace tickmark::ledger::pg

#include "server/ledger/sqlite/sqlite_ledger.h"

#include <sqlite3.h>

#include <cmath>
#include <future>
#include <sstream>

#include "server/base/strings.h"
#include "server/base/log.h"
#include "server/ledger/sqlite/migrations.h"

namespace tickmark::ledger {
namespace {

using tickmark::v1::Record;

absl::Status SqlError(sqlite3* db, std::string_view what) {
  int code = sqlite3_errcode(db);
  std::string msg = Cat(what, ": ", sqlite3_errmsg(db));
  if (code == SQLITE_FULL || code == SQLITE_IOERR || code == SQLITE_BUSY || code == SQLITE_LOCKED) {
    return absl::UnavailableError(msg);
  }
  if (code == SQLITE_CONSTRAINT) return absl::AlreadyExistsError(msg);
  return absl::InternalError(msg);
}

}  // namespace

// A prepared statement, finalised on destruction. Bind indexes start at 1.
class Stmt {
 public:
  Stmt(sqlite3* db, const char* sql) : db_(db) {
    if (sqlite3_prepare_v3(db, sql, -1, SQLITE_PREPARE_PERSISTENT, &stmt_, nullptr) != SQLITE_OK) {
      status_ = SqlError(db, Cat("prepare ", std::string_view(sql).substr(0, 60)));
      stmt_ = nullptr;
    }
  }
  ~Stmt() { sqlite3_finalize(stmt_); }
  Stmt(const Stmt&) = delete;
  Stmt& operator=(const Stmt&) = delete;

  const absl::Status& status() const { return status_; }
  Stmt& Reset() {
    sqlite3_reset(stmt_);
    sqlite3_clear_bindings(stmt_);
    next_ = 1;
    return *this;
  }
  Stmt& Bind(int64_t v) {
    sqlite3_bind_int64(stmt_, next_++, v);
    return *this;
  }
  Stmt& Bind(uint64_t v) { return Bind(static_cast<int64_t>(v)); }
  Stmt& Bind(int v) { return Bind(static_cast<int64_t>(v)); }
  Stmt& Bind(bool v) { return Bind(static_cast<int64_t>(v ? 1 : 0)); }
  Stmt& Bind(double v) {
    sqlite3_bind_double(stmt_, next_++, v);
    return *this;
  }
  Stmt& Bind(std::string_view v) {
    sqlite3_bind_text(stmt_, next_++, v.data(), static_cast<int>(v.size()), SQLITE_TRANSIENT);
    return *this;
  }
  Stmt& Bind(const std::string& v) { return Bind(std::string_view(v)); }
  Stmt& Bind(const char* v) { return Bind(std::string_view(v)); }
  Stmt& BindBlob(std::string_view v) {
    sqlite3_bind_blob(stmt_, next_++, v.data(), static_cast<int>(v.size()), SQLITE_TRANSIENT);
    return *this;
  }
  Stmt& BindNull() {
    sqlite3_bind_null(stmt_, next_++);
    return *this;
  }
  // Binds NULL for 0 (optional times).
  Stmt& BindOptional(int64_t v) { return v == 0 ? BindNull() : Bind(v); }

  // SQLITE_ROW -> true, SQLITE_DONE -> false, error -> status.
  absl::StatusOr<bool> Step() {
    int rc = sqlite3_step(stmt_);
    if (rc == SQLITE_ROW) return true;
    if (rc == SQLITE_DONE) return false;
    return SqlError(db_, "step");
  }
  absl::Status Run() {
    auto r = Step();
    return r.ok() ? absl::OkStatus() : r.status();
  }
  int64_t Int(int col) const { return sqlite3_column_int64(stmt_, col); }
  double Real(int col) const { return sqlite3_column_double(stmt_, col); }
  bool IsNull(int col) const { return sqlite3_column_type(stmt_, col) == SQLITE_NULL; }
  std::string Text(int col) const {
    const unsigned char* p = sqlite3_column_text(stmt_, col);
    return p ? std::string(reinterpret_cast<const char*>(p),
                           static_cast<size_t>(sqlite3_column_bytes(stmt_, col)))
             : std::string();
  }
  std::string Blob(int col) const {
    const void* p = sqlite3_column_blob(stmt_, col);
    return p ? std::string(static_cast<const char*>(p),
                           static_cast<size_t>(sqlite3_column_bytes(stmt_, col)))
             : std::string();
  }

 private:
  sqlite3* db_;
  sqlite3_stmt* stmt_ = nullptr;
  absl::Status status_;
  int next_ = 1;
};

namespace {

absl::Status Exec(sqlite3* db, const char* sql) {
  char* err = nullptr;
  if (sqlite3_exec(db, sql, nullptr, nullptr, &err) != SQLITE_OK) {
    std::string msg = err ? err : "unknown error";
    sqlite3_free(err);
    return absl::InternalError(Cat("sqlite: ", msg));
  }
  return absl::OkStatus();
}

absl::StatusOr<sqlite3*> OpenDb(const std::string& path, bool full) {
  sqlite3* db = nullptr;
  int flags = SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE | SQLITE_OPEN_NOMUTEX;
  if (sqlite3_open_v2(path.c_str(), &db, flags, nullptr) != SQLITE_OK) {
    absl::Status s = absl::UnavailableError(
        Cat("cannot open ledger ", path, ": ", db ? sqlite3_errmsg(db) : "out of memory"));
    sqlite3_close(db);
    return s;
  }
  sqlite3_busy_timeout(db, 5000);
  absl::Status s = Exec(db, "PRAGMA journal_mode=WAL; PRAGMA foreign_keys=ON;");
  if (s.ok()) s = Exec(db, full ? "PRAGMA synchronous=FULL;" : "PRAGMA synchronous=NORMAL;");
  if (!s.ok()) {
    sqlite3_close(db);
    return s;
  }
  return db;
}

absl::Status Migrate(sqlite3* db) {
  absl::Status s = Exec(db,
                        "CREATE TABLE IF NOT EXISTS schema_migrations ("
                        " version INTEGER PRIMARY KEY, description TEXT NOT NULL,"
                        " applied_utc TEXT NOT NULL DEFAULT (strftime('%Y-%m-%dT%H:%M:%SZ','now')));");
  if (!s.ok()) return s;
  int64_t have = 0;
  {
    Stmt q(db, "SELECT COALESCE(MAX(version), 0) FROM schema_migrations");
    if (!q.status().ok()) return q.status();
    auto row = q.Step();
    if (!row.ok()) return row.status();
    have = q.Int(0);
  }
  auto all = SqliteMigrations();
  if (have > static_cast<int64_t>(all.size())) {
    return absl::FailedPreconditionError(Cat(
        "ledger schema version ", have, " is newer than this program knows (", all.size(),
        "); use a newer tickmarkd"));
  }
  for (const Migration& m : all) {
    if (m.version <= have) continue;
    if (s = Exec(db, "BEGIN IMMEDIATE"); !s.ok()) return s;
    s = Exec(db, m.sql);
    if (s.ok()) {
      Stmt ins(db, "INSERT INTO schema_migrations (version, description) VALUES (?, ?)");
      s = ins.status().ok() ? ins.Bind(m.version).Bind(m.description).Run() : ins.status();
    }
    if (!s.ok()) {
      Exec(db, "ROLLBACK").IgnoreError();
      return absl::InternalError(Cat("migration ", m.version, " failed: ", s.message()));
    }
    if (s = Exec(db, "COMMIT"); !s.ok()) return s;
    TM_LOG(kInfo) << "ledger schema migrated to version " << m.version << " (" << m.description
                  << ")";
  }
  return absl::OkStatus();
}

const char* RoleName(tickmark::v1::Role r) {
  switch (r) {
    case tickmark::v1::ROLE_ADMIN: return "admin";
    case tickmark::v1::ROLE_TRAINER: return "trainer";
    case tickmark::v1::ROLE_AGENT: return "agent";
    case tickmark::v1::ROLE_OBSERVER: return "observer";
    default: return "";
  }
}

tickmark::v1::Role RoleFromName(std::string_view n) {
  if (n == "admin") return tickmark::v1::ROLE_ADMIN;
  if (n == "trainer") return tickmark::v1::ROLE_TRAINER;
  if (n == "agent") return tickmark::v1::ROLE_AGENT;
  if (n == "observer") return tickmark::v1::ROLE_OBSERVER;
  return tickmark::v1::ROLE_UNSPECIFIED;
}

std::string SourceKindName(tickmark::v1::SourceKind k) {
  std::string n = tickmark::v1::SourceKind_Name(k);
  constexpr std::string_view kPrefix = "SOURCE_KIND_";
  if (n.rfind(kPrefix, 0) == 0) n = n.substr(kPrefix.size());
  for (char& c : n) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return n;
}

std::string JsonEscape(std::string_view s) {
  std::string out;
  for (char c : s) {
    switch (c) {
      case '"': out += "\\\""; break;
      case '\\': out += "\\\\"; break;
      case '\n': out += "\\n"; break;
      default:
        if (static_cast<unsigned char>(c) < 0x20) {
          char buf[8];
          std::snprintf(buf, sizeof buf, "\\u%04x", c);
          out += buf;
        } else {
          out += c;
        }
    }
  }
  return out;
}

SessionRow SessionFromRow(const Stmt& q) {
  SessionRow row;
  row.id = q.Text(0);
  row.title = q.Text(1);
  row.study = q.Text(2);
  row.open = q.Text(3) == "open";
  row.opened_session_ns = q.Int(4);
  row.closed_session_ns = q.IsNull(5) ? 0 : q.Int(5);
  row.utc_anchor_ns = q.Int(6);
  row.mono_anchor_ns = q.Int(7);
  row.boot_id = q.Text(8);
  row.last_sequence = static_cast<uint64_t>(q.Int(9));
  return row;
}

constexpr const char* kSessionColumns =
    "id, title, study, state, opened_session_ns, closed_session_ns, utc_anchor_ns, "
    "mono_anchor_ns, boot_id, (SELECT COALESCE(MAX(seq), 0) FROM record r WHERE r.session_id = "
    "session.id)";

TokenRow TokenFromRow(const Stmt& q) {
  TokenRow t;
  t.id = q.Text(0);
  t.session_id = q.Text(1);
  t.role = RoleFromName(q.Text(2));
  t.subject = q.Text(3);
  t.hash = q.Blob(4);
  t.issued_session_ns = q.Int(5);
  t.revoked = q.Int(6) != 0;
  return t;
}

constexpr const char* kTokenColumns =
    "id, COALESCE(session_id, ''), role, subject, secret_sha256, issued_session_ns, revoked";

}  // namespace

absl::StatusOr<std::unique_ptr<SqliteLedger>> SqliteLedger::Open(const Options& options) {
  auto writer = OpenDb(options.path, options.synchronous_full);
  if (!writer.ok()) return writer.status();
  if (absl::Status s = Migrate(*writer); !s.ok()) {
    sqlite3_close(*writer);
    return s;
  }
  auto reader = OpenDb(options.path, options.synchronous_full);
  if (!reader.ok()) {
    sqlite3_close(*writer);
    return reader.status();
  }
  std::unique_ptr<SqliteLedger> ledger(new SqliteLedger(options, *writer, *reader));
  if (absl::Status s = ledger->LoadChains(); !s.ok()) return s;
  ledger->writer_ = std::thread([l = ledger.get()] { l->WriterLoop(); });
  return ledger;
}

SqliteLedger::SqliteLedger(Options options, sqlite3* writer, sqlite3* reader)
    : options_(std::move(options)), writer_db_(writer), reader_db_(reader) {}

SqliteLedger::~SqliteLedger() { Close(); }

absl::Status SqliteLedger::LoadChains() {
  Stmt q(writer_db_,
         "SELECT r.session_id, r.seq, r.hash FROM record r JOIN "
         "(SELECT session_id, MAX(seq) AS m FROM record GROUP BY session_id) x "
         "ON r.session_id = x.session_id AND r.seq = x.m");
  if (!q.status().ok()) return q.status();
  std::lock_guard<std::mutex> lock(mu_);
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    Chain& c = chains_[q.Text(0)];
    c.next_sequence = static_cast<uint64_t>(q.Int(1)) + 1;
    c.last_hash = q.Blob(2);
    committed_[q.Text(0)] = static_cast<uint64_t>(q.Int(1));
  }
  return absl::OkStatus();
}

void SqliteLedger::Close() {
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (closing_ && !writer_.joinable()) return;
    closing_ = true;
  }
  work_cv_.notify_all();
  if (writer_.joinable()) writer_.join();
  statements_.reset();  // finalise before closing the connection
  std::lock_guard<std::mutex> lock(read_mu_);
  if (reader_db_ != nullptr) sqlite3_close(reader_db_);
  if (writer_db_ != nullptr) {
    // A clean close checkpoints the WAL into the main file.
    sqlite3_close(writer_db_);
  }
  reader_db_ = nullptr;
  writer_db_ = nullptr;
}

absl::Status SqliteLedger::RunSync(std::function<absl::Status(sqlite3*)> op) {
  std::promise<absl::Status> result;
  auto future = result.get_future();
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (closing_) return absl::UnavailableError("ledger is closed");
    if (!failed_.ok()) return failed_;
    Work w;
    w.op = std::move(op);
    w.op_done = [&result](absl::Status s) { result.set_value(std::move(s)); };
    queue_.push_back(std::move(w));
  }
  work_cv_.notify_one();
  return future.get();
}

absl::StatusOr<uint64_t> SqliteLedger::Append(std::string_view session_id,
                                              std::vector<Record> records, CommitCallback done) {
  uint64_t first = 0;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (closing_) return absl::UnavailableError("ledger is closed");
    if (!failed_.ok()) return failed_;
    auto it = chains_.find(session_id);
    if (it == chains_.end()) it = chains_.emplace(std::string(session_id), Chain{}).first;
    Chain& chain = it->second;
    first = chain.next_sequence;
    for (Record& r : records) {
      r.set_session_id(std::string(session_id));
      r.set_sequence(chain.next_sequence++);
      r.set_hash(ChainHash(chain.last_hash, r));
      chain.last_hash = r.hash();
    }
    Work w;
    w.session_id = std::string(session_id);
    w.records = std::move(records);
    w.done = std::move(done);
    queue_.push_back(std::move(w));
  }
  work_cv_.notify_one();
  return first;
}

void SqliteLedger::Barrier(std::function<void()> done) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (!closing_) {
      Work w;
      w.barrier = std::move(done);
      queue_.push_back(std::move(w));
      work_cv_.notify_one();
      return;
    }
  }
  done();
}

absl::Status SqliteLedger::Flush() {
  std::promise<void> p;
  auto f = p.get_future();
  Barrier([&p] { p.set_value(); });
  f.wait();
  std::lock_guard<std::mutex> lock(mu_);
  return failed_;
}

void SqliteLedger::WriterLoop() {
  while (true) {
    std::vector<Work> batch;
    {
      std::unique_lock<std::mutex> lock(mu_);
      work_cv_.wait(lock, [this] { return closing_ || !queue_.empty(); });
      if (queue_.empty() && closing_) return;
      size_t records = 0;
      while (!queue_.empty() && (batch.empty() || records < options_.max_batch_records)) {
        records += queue_.front().records.size();
        batch.push_back(std::move(queue_.front()));
        queue_.pop_front();
      }
    }
    // Consecutive record appends share one transaction; synchronous
    // operations run alone; barriers fire once what precedes them is done.
    size_t i = 0;
    while (i < batch.size()) {
      if (batch[i].op) {
        Work& w = batch[i++];
        absl::Status s = Exec(writer_db_, "BEGIN IMMEDIATE");
        if (s.ok()) s = w.op(writer_db_);
        if (s.ok()) {
          s = Exec(writer_db_, "COMMIT");
        } else {
          Exec(writer_db_, "ROLLBACK").IgnoreError();
        }
        w.op_done(s);
        continue;
      }
      if (batch[i].barrier) {
        batch[i++].barrier();
        continue;
      }
      size_t end = i;
      while (end < batch.size() && !batch[end].op && !batch[end].barrier) ++end;
      absl::Status s;
      {
        std::lock_guard<std::mutex> lock(mu_);
        s = failed_;
      }
      if (s.ok()) s = Exec(writer_db_, "BEGIN IMMEDIATE");
      for (size_t j = i; s.ok() && j < end; ++j) {
        for (const Record& r : batch[j].records) {
          s = InsertRecord(r);
          if (!s.ok()) break;
        }
      }
      if (s.ok()) {
        s = Exec(writer_db_, "COMMIT");
      } else {
        Exec(writer_db_, "ROLLBACK").IgnoreError();
      }
      {
        std::lock_guard<std::mutex> lock(mu_);
        if (!s.ok() && failed_.ok()) {
          // Sequences were handed out for these records; the chain can no
          // longer be trusted, so refuse further writes until a restart.
          failed_ = absl::UnavailableError(Cat("ledger write failed: ", s.message()));
          TM_LOG(kError) << failed_.message();
        }
        if (s.ok()) {
          for (size_t j = i; j < end; ++j) {
            if (!batch[j].records.empty()) {
              committed_[batch[j].session_id] = batch[j].records.back().sequence();
            }
          }
        }
      }
      for (size_t j = i; j < end; ++j) {
        if (batch[j].done) batch[j].done(s, batch[j].records);
      }
      i = end;
    }
  }
}

// Statements are prepared once per writer connection; only the writer
// thread uses them.
struct SqliteLedger::Statements {
  std::map<std::string, std::unique_ptr<Stmt>> cache;
};

Stmt& SqliteLedger::Prepared(const char* sql) {
  if (!statements_) statements_ = std::make_unique<Statements>();
  auto& s = statements_->cache[sql];
  if (!s) s = std::make_unique<Stmt>(writer_db_, sql);
  return s->Reset();
}

absl::Status SqliteLedger::InsertDerivedRow(std::string_view set, uint64_t seq, const Record& r) {
  const std::string& sid = r.session_id();
  switch (r.body_case()) {
    case Record::kCredit: {
      const auto& c = r.credit();
      return Prepared("INSERT INTO credit VALUES (?,?,?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(set).Bind(c.feedback_sequence()).Bind(c.step_sequence())
          .Bind(c.trainer()).Bind(c.agent()).Bind(c.step_id()).Bind(c.credit()).Bind(c.value())
          .Bind(c.weight()).Bind(c.kernel())
          .Run();
    }
    case Record::kLabel: {
      const auto& l = r.label();
      std::ostringstream parts;
      parts.precision(17);
      parts << "[";
      for (int i = 0; i < l.parts_size(); ++i) {
        const auto& p = l.parts(i);
        parts << (i ? "," : "") << "{\"trainer\":\"" << JsonEscape(p.trainer())
              << "\",\"value\":" << p.value() << ",\"weight\":" << p.weight() << "}";
      }
      parts << "]";
      return Prepared("INSERT INTO label VALUES (?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(set).Bind(l.step_sequence()).Bind(l.agent())
          .Bind(l.step_id()).Bind(l.value()).Bind(l.weight()).Bind(parts.str())
          .Run();
    }
    case Record::kUnmatched: {
      const auto& u = r.unmatched();
      return Prepared("INSERT INTO unmatched VALUES (?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(set)
          .BindOptional(static_cast<int64_t>(u.feedback_sequence()))
          .Bind(u.trainer()).BindOptional(static_cast<int64_t>(u.step_sequence()))
          .Bind(u.agent()).Bind(u.reason())
          .Run();
    }
    default:
      return absl::InvalidArgumentError("a derived set holds credit, label and unmatched records");
  }
}

absl::Status SqliteLedger::InsertRecord(const Record& r) {
  auto stmt = [this](const char* sql) -> Stmt& { return Prepared(sql); };
  const std::string& sid = r.session_id();
  const auto seq = r.sequence();
  auto key = ClientKeyOf(r);
  Stmt& journal = stmt(
      "INSERT INTO record (session_id, seq, kind, written_session_ns, client_id, client_seq, "
      "body, hash) VALUES (?, ?, ?, ?, ?, ?, ?, ?)");
  if (!journal.status().ok()) return journal.status();
  journal.Bind(sid).Bind(seq).Bind(RecordKindName(r)).Bind(r.written_session_ns());
  if (key) {
    journal.Bind(key->first).Bind(key->second);
  } else {
    journal.BindNull().BindNull();
  }
  if (absl::Status s = journal.BindBlob(CanonicalBody(r)).BindBlob(r.hash()).Run(); !s.ok()) return s;

  switch (r.body_case()) {
    case Record::kFeedback: {
      const auto& f = r.feedback();
      return stmt("INSERT INTO feedback VALUES (?,?,?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(f.client_id()).Bind(f.client_sequence()).Bind(f.trainer())
          .Bind(f.value()).Bind(f.input()).Bind(f.event_source_ns()).Bind(f.arrival_session_ns())
          .Bind(f.event_session_ns()).Bind(f.uncertainty_ns()).Bind(f.late())
          .Run();
    }
    case Record::kStep: {
      const auto& s = r.step();
      return stmt("INSERT INTO step VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(s.client_id()).Bind(s.client_sequence()).Bind(s.agent())
          .Bind(s.step_id()).Bind(s.episode()).Bind(s.action()).Bind(s.start_agent_ns())
          .BindOptional(s.end_agent_ns()).Bind(s.start_session_ns())
          .BindOptional(s.end_session_ns()).Bind(s.arrival_session_ns())
          .Bind(s.uncertainty_ns()).BindBlob(s.state()).Bind(s.features_size()).Bind(s.late())
          .Run();
    }
    case Record::kProbe: {
      const auto& p = r.probe();
      return stmt("INSERT INTO probe VALUES (?,?,?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(p.client_id()).Bind(p.probe_id()).Bind(p.t1_session_ns())
          .Bind(p.t2_client_ns()).Bind(p.t3_client_ns()).Bind(p.t4_session_ns())
          .Bind(p.offset_ns()).Bind(p.delay_ns()).Bind(p.accepted()).Bind(p.reject_reason())
          .Run();
    }
    case Record::kClockModel: {
      const auto& m = r.clock_model();
      return stmt("INSERT INTO clock_model VALUES (?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(m.client_id()).Bind(m.offset_ns()).Bind(m.drift_ppm())
          .Bind(m.reference_client_ns()).Bind(m.uncertainty_ns()).Bind(m.min_delay_ns())
          .Bind(static_cast<int64_t>(m.samples())).Bind(m.reason())
          .Run();
    }
    case Record::kMarker: {
      const auto& m = r.marker();
      return stmt("INSERT INTO marker VALUES (?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(m.at_session_ns()).Bind(m.text()).Bind(m.author())
          .Run();
    }
    case Record::kClientEvent: {
      const auto& e = r.client_event();
      const auto& c = e.client();
      absl::Status s =
          stmt("INSERT INTO client_event VALUES (?,?,?,?,?,?)")
              .Bind(sid).Bind(seq).Bind(c.client_id())
              .Bind(e.event() == tickmark::v1::ClientEvent::KIND_CONNECTED ? "connected"
                                                                           : "disconnected")
              .Bind(e.detail()).Bind(r.written_session_ns())
              .Run();
      if (!s.ok()) return s;
      return stmt(
                 "INSERT INTO client VALUES (?,?,?,?,?,?,?,?,?,?) ON CONFLICT (session_id, "
                 "client_id) DO UPDATE SET last_seen_session_ns = excluded.last_seen_session_ns, "
                 "source_description = excluded.source_description, software = excluded.software")
          .Bind(sid).Bind(c.client_id()).Bind(RoleName(c.role())).Bind(c.subject())
          .Bind(SourceKindName(c.source_kind())).Bind(c.source_description()).Bind(c.software())
          .Bind(seq).Bind(r.written_session_ns()).Bind(r.written_session_ns())
          .Run();
    }
    case Record::kCredit:
    case Record::kLabel:
    case Record::kUnmatched:
      return InsertDerivedRow("live", seq, r);
    case Record::kKernel: {
      const auto& k = r.kernel();
      return stmt("INSERT INTO kernel_setting VALUES (?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(k.trainer()).Bind(k.description()).Bind(k.weight())
          .Bind(k.author())
          .Run();
    }
    case Record::kSessionEvent: {
      const auto& e = r.session_event();
      return stmt("INSERT INTO session_event VALUES (?,?,?,?,?)")
          .Bind(sid).Bind(seq)
          .Bind(e.event() == tickmark::v1::SessionEvent::KIND_OPENED   ? "opened"
                : e.event() == tickmark::v1::SessionEvent::KIND_CLOSED ? "closed"
                                                                       : "reanchored")
          .Bind(e.detail()).Bind(r.written_session_ns())
          .Run();
    }
    case Record::BODY_NOT_SET:
      break;
  }
  return absl::InvalidArgumentError("record has no body");
}

absl::Status SqliteLedger::CreateSession(const SessionRow& row) {
  return RunSync([&row](sqlite3* db) {
    Stmt q(db,
           "INSERT INTO session (id, title, study, state, opened_session_ns, utc_anchor_ns, "
           "mono_anchor_ns, boot_id) VALUES (?, ?, ?, 'open', ?, ?, ?, ?)");
    if (!q.status().ok()) return q.status();
    return q.Bind(row.id).Bind(row.title).Bind(row.study).Bind(row.opened_session_ns)
        .Bind(row.utc_anchor_ns).Bind(row.mono_anchor_ns).Bind(row.boot_id)
        .Run();
  });
}

absl::StatusOr<SessionRow> SqliteLedger::GetSession(std::string_view id) {
  std::lock_guard<std::mutex> lock(read_mu_);
  Stmt q(reader_db_, Cat("SELECT ", kSessionColumns, " FROM session WHERE id = ?").c_str());
  if (!q.status().ok()) return q.status();
  auto row = q.Bind(id).Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError(Cat("no session '", id, "'"));
  return SessionFromRow(q);
}

absl::StatusOr<std::vector<SessionRow>> SqliteLedger::ListSessions(bool include_closed) {
  std::lock_guard<std::mutex> lock(read_mu_);
  Stmt q(reader_db_, Cat("SELECT ", kSessionColumns, " FROM session ",
                                  include_closed ? "" : "WHERE state = 'open' ",
                                  "ORDER BY opened_session_ns")
                         .c_str());
  if (!q.status().ok()) return q.status();
  std::vector<SessionRow> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    out.push_back(SessionFromRow(q));
  }
  return out;
}

absl::Status SqliteLedger::CloseSession(std::string_view id, int64_t closed_session_ns) {
  return RunSync([id, closed_session_ns](sqlite3* db) -> absl::Status {
    Stmt q(db, "UPDATE session SET state = 'closed', closed_session_ns = ? WHERE id = ?");
    if (!q.status().ok()) return q.status();
    if (absl::Status s = q.Bind(closed_session_ns).Bind(id).Run(); !s.ok()) return s;
    if (sqlite3_changes(db) == 0) return absl::NotFoundError(Cat("no session '", id, "'"));
    return absl::OkStatus();
  });
}

absl::Status SqliteLedger::ReanchorSession(std::string_view id, int64_t utc_anchor_ns,
                                           int64_t mono_anchor_ns, std::string_view boot_id) {
  return RunSync([=](sqlite3* db) {
    Stmt q(db, "UPDATE session SET utc_anchor_ns = ?, mono_anchor_ns = ?, boot_id = ? WHERE id = ?");
    if (!q.status().ok()) return q.status();
    return q.Bind(utc_anchor_ns).Bind(mono_anchor_ns).Bind(boot_id).Bind(id).Run();
  });
}

absl::Status SqliteLedger::PutToken(const TokenRow& row) {
  return RunSync([&row](sqlite3* db) {
    Stmt q(db,
           "INSERT INTO token (id, session_id, role, subject, secret_sha256, issued_session_ns, "
           "revoked) VALUES (?, ?, ?, ?, ?, ?, ?)");
    if (!q.status().ok()) return q.status();
    if (row.session_id.empty()) {
      q.Bind(row.id).BindNull();
    } else {
      q.Bind(row.id).Bind(row.session_id);
    }
    return q.Bind(RoleName(row.role)).Bind(row.subject).BindBlob(row.hash)
        .Bind(row.issued_session_ns).Bind(row.revoked)
        .Run();
  });
}

absl::StatusOr<TokenRow> SqliteLedger::FindTokenByHash(std::string_view hash) {
  std::lock_guard<std::mutex> lock(read_mu_);
  Stmt q(reader_db_,
         Cat("SELECT ", kTokenColumns, " FROM token WHERE secret_sha256 = ?").c_str());
  if (!q.status().ok()) return q.status();
  auto row = q.BindBlob(hash).Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError("unknown token");
  return TokenFromRow(q);
}

absl::StatusOr<std::vector<TokenRow>> SqliteLedger::ListTokens(std::string_view session_id) {
  std::lock_guard<std::mutex> lock(read_mu_);
  Stmt q(reader_db_, Cat("SELECT ", kTokenColumns,
                                  " FROM token WHERE session_id = ? ORDER BY issued_session_ns, id")
                         .c_str());
  if (!q.status().ok()) return q.status();
  q.Bind(session_id);
  std::vector<TokenRow> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    out.push_back(TokenFromRow(q));
  }
  return out;
}

absl::StatusOr<TokenRow> SqliteLedger::RevokeToken(std::string_view session_id,
                                                   std::string_view token_id) {
  absl::Status s = RunSync([=](sqlite3* db) -> absl::Status {
    Stmt q(db, "UPDATE token SET revoked = 1 WHERE id = ? AND session_id = ?");
    if (!q.status().ok()) return q.status();
    if (absl::Status st = q.Bind(token_id).Bind(session_id).Run(); !st.ok()) return st;
    if (sqlite3_changes(db) == 0) {
      return absl::NotFoundError(
          Cat("no token '", token_id, "' in session '", session_id, "'"));
    }
    return absl::OkStatus();
  });
  if (!s.ok()) return s;
  std::lock_guard<std::mutex> lock(read_mu_);
  Stmt q(reader_db_, Cat("SELECT ", kTokenColumns, " FROM token WHERE id = ?").c_str());
  if (!q.status().ok()) return q.status();
  auto row = q.Bind(token_id).Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError("token vanished");
  return TokenFromRow(q);
}

absl::StatusOr<std::vector<Record>> SqliteLedger::Read(std::string_view session_id, uint64_t from,
                                                       size_t max) {
  std::lock_guard<std::mutex> lock(read_mu_);
  Stmt q(reader_db_,
         "SELECT body, hash FROM record WHERE session_id = ? AND seq >= ? ORDER BY seq LIMIT ?");
  if (!q.status().ok()) return q.status();
  q.Bind(session_id).Bind(from).Bind(static_cast<int64_t>(max));
  std::vector<Record> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    Record r;
    std::string body = q.Blob(0);
    if (!r.ParseFromString(body)) {
      return absl::DataLossError(Cat("record body does not parse in session ", session_id));
    }
    r.set_hash(q.Blob(1));
    out.push_back(std::move(r));
  }
  return out;
}

absl::StatusOr<std::optional<uint64_t>> SqliteLedger::FindClientSequence(
    std::string_view session_id, std::string_view client_id, uint64_t client_sequence) {
  std::lock_guard<std::mutex> lock(read_mu_);
  Stmt q(reader_db_,
         "SELECT seq FROM record WHERE session_id = ? AND client_id = ? AND client_seq = ?");
  if (!q.status().ok()) return q.status();
  auto row = q.Bind(session_id).Bind(client_id).Bind(client_sequence).Step();
  if (!row.ok()) return row.status();
  if (!*row) return std::optional<uint64_t>();
  return std::optional<uint64_t>(static_cast<uint64_t>(q.Int(0)));
}

absl::StatusOr<uint64_t> SqliteLedger::LastClientSequence(std::string_view session_id,
                                                          std::string_view client_id) {
  std::lock_guard<std::mutex> lock(read_mu_);
  Stmt q(reader_db_,
         "SELECT COALESCE(MAX(client_seq), 0) FROM record WHERE session_id = ? AND client_id = ? "
         "AND client_seq IS NOT NULL");
  if (!q.status().ok()) return q.status();
  auto row = q.Bind(session_id).Bind(client_id).Step();
  if (!row.ok()) return row.status();
  return static_cast<uint64_t>(q.Int(0));
}

absl::StatusOr<RecordCounts> SqliteLedger::Counts(std::string_view session_id) {
  std::lock_guard<std::mutex> lock(read_mu_);
  Stmt q(reader_db_,
         "SELECT (SELECT COUNT(*) FROM feedback WHERE session_id = ?1),"
         " (SELECT COUNT(*) FROM step WHERE session_id = ?1),"
         " (SELECT COUNT(*) FROM probe WHERE session_id = ?1),"
         " (SELECT COUNT(*) FROM marker WHERE session_id = ?1),"
         " (SELECT COUNT(*) FROM client WHERE session_id = ?1),"
         " (SELECT COUNT(*) FROM feedback WHERE session_id = ?1 AND late)"
         "  + (SELECT COUNT(*) FROM step WHERE session_id = ?1 AND late),"
         " (SELECT COUNT(*) FROM unmatched WHERE session_id = ?1 AND derived_set = 'live'),"
         " (SELECT COUNT(*) FROM probe WHERE session_id = ?1 AND NOT accepted)");
  if (!q.status().ok()) return q.status();
  auto row = q.Bind(session_id).Step();
  if (!row.ok()) return row.status();
  RecordCounts c;
  c.feedback = static_cast<uint64_t>(q.Int(0));
  c.steps = static_cast<uint64_t>(q.Int(1));
  c.probes = static_cast<uint64_t>(q.Int(2));
  c.markers = static_cast<uint64_t>(q.Int(3));
  c.clients = static_cast<uint64_t>(q.Int(4));
  c.late = static_cast<uint64_t>(q.Int(5));
  c.unmatched = static_cast<uint64_t>(q.Int(6));
  c.rejected_probes = static_cast<uint64_t>(q.Int(7));
  return c;
}

absl::Status SqliteLedger::PutDerivedSet(std::string_view session_id, std::string_view name,
                                         std::string_view spec, const std::vector<Record>& records,
                                         bool overwrite) {
  return RunSync([&, this](sqlite3* db) -> absl::Status {
    {
      Stmt q(db, "SELECT COUNT(*) FROM derived_set WHERE session_id = ? AND name = ?");
      auto row = q.Bind(session_id).Bind(name).Step();
      if (!row.ok()) return row.status();
      if (q.Int(0) > 0 && !overwrite) {
        return absl::AlreadyExistsError(Cat("derived set '", name, "' exists in session ",
                                            session_id, " (ask to overwrite it)"));
      }
    }
    for (const char* sql : {"DELETE FROM credit WHERE session_id = ? AND derived_set = ?",
                            "DELETE FROM label WHERE session_id = ? AND derived_set = ?",
                            "DELETE FROM unmatched WHERE session_id = ? AND derived_set = ?",
                            "DELETE FROM derived_set WHERE session_id = ? AND name = ?"}) {
      Stmt d(db, sql);
      if (absl::Status st = d.Bind(session_id).Bind(name).Run(); !st.ok()) return st;
    }
    Stmt ins(db, "INSERT INTO derived_set (session_id, name, spec) VALUES (?, ?, ?)");
    if (absl::Status st = ins.Bind(session_id).Bind(name).Bind(spec).Run(); !st.ok()) return st;
    uint64_t seq = 0;
    for (const Record& r : records) {
      Record copy = r;
      copy.set_session_id(std::string(session_id));
      if (absl::Status st = InsertDerivedRow(name, ++seq, copy); !st.ok()) return st;
    }
    return absl::OkStatus();
  });
}

uint64_t SqliteLedger::CommittedSequence(std::string_view session_id) {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = committed_.find(session_id);
  return it == committed_.end() ? 0 : it->second;
}

}  // namespace tickmark::ledger

#include "server/ledger/postgres/postgres_ledger.h"

#include <libpq-fe.h>
#include <poll.h>
#include <unistd.h>

#include <future>
#include <random>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/ledger/postgres/pg_conn.h"
#include "server/ledger/postgres/pg_migrations.h"
#include "server/ledger/sqlite/enum_names.h"

namespace tickmark::ledger {
namespace {

using pg::Params;
using pg::PgConn;
using pg::Result;
using tickmark::v1::Record;
using SteadyClock = std::chrono::steady_clock;

constexpr char kNotifyChannel[] = "tickmark_records";

std::string DefaultInstanceId() {
  char host[256] = {};
  gethostname(host, sizeof host - 1);
  std::random_device rd;
  return Cat(host, ":", getpid(), ":", std::to_string(rd() % 1000000));
}

std::string Interval(std::chrono::milliseconds ms) { return Cat(ms.count(), " milliseconds"); }

constexpr const char* kSessionColumns =
    "id, title, study, state, opened_session_ns, COALESCE(closed_session_ns, 0), utc_anchor_ns, "
    "mono_anchor_ns, boot_id, (SELECT COALESCE(MAX(seq), 0) FROM record r WHERE r.session_id = "
    "session.id), pin_kernels";

SessionRow SessionFrom(const Result& q, int i) {
  SessionRow row;
  row.id = q.Bytes(i, 0);
  row.title = q.Bytes(i, 1);
  row.study = q.Bytes(i, 2);
  row.open = q.Bytes(i, 3) == "open";
  row.opened_session_ns = q.Int(i, 4);
  row.closed_session_ns = q.Int(i, 5);
  row.utc_anchor_ns = q.Int(i, 6);
  row.mono_anchor_ns = q.Int(i, 7);
  row.boot_id = q.Bytes(i, 8);
  row.last_sequence = static_cast<uint64_t>(q.Int(i, 9));
  row.pin_kernels = q.Bool(i, 10);
  return row;
}

constexpr const char* kTokenColumns =
    "id, COALESCE(session_id, ''), role, subject, secret_sha256, issued_session_ns, revoked";

TokenRow TokenFrom(const Result& q, int i) {
  TokenRow t;
  t.id = q.Bytes(i, 0);
  t.session_id = q.Bytes(i, 1);
  t.role = RoleFromWord(q.Bytes(i, 2));
  t.subject = q.Bytes(i, 3);
  t.hash = q.Bytes(i, 4);
  t.issued_session_ns = q.Int(i, 5);
  t.revoked = q.Bool(i, 6);
  return t;
}

absl::StatusOr<Record> RecordFrom(const Result& q, int i, int body_col,
                                  std::string_view session_id) {
  Record r;
  if (!r.ParseFromString(q.Bytes(i, body_col))) {
    return absl::DataLossError(Cat("record body does not parse in session ", session_id));
  }
  r.set_hash(q.Bytes(i, body_col + 1));
  return r;
}

absl::StatusOr<std::vector<Record>> RecordsFrom(const Result& q, std::string_view session_id) {
  std::vector<Record> out;
  out.reserve(static_cast<size_t>(q.rows()));
  for (int i = 0; i < q.rows(); ++i) {
    auto r = RecordFrom(q, i, 0, session_id);
    if (!r.ok()) return r.status();
    out.push_back(*std::move(r));
  }
  return out;
}

CalibrationRow CalibrationFrom(const Result& q, int i) {
  CalibrationRow c;
  c.id = q.Bytes(i, 0);
  c.trainer = q.Bytes(i, 1);
  c.session_id = q.Bytes(i, 2);
  c.sequence = static_cast<uint64_t>(q.Int(i, 3));
  c.created_session_ns = q.Int(i, 4);
  c.family = q.Bytes(i, 5);
  c.kernel_description = q.Bytes(i, 6);
  c.valid = static_cast<uint32_t>(q.Int(i, 7));
  c.warning = q.Bool(i, 8);
  c.source_kind = SourceKindFromWord(q.Bytes(i, 9));
  return c;
}

constexpr const char* kTimeSetColumns =
    "id, session_id, created_utc, method, parameters, through_seq, head_hash, events, retimed";

TimeSetRow TimeSetFrom(const Result& q, int i) {
  TimeSetRow t;
  t.id = q.Bytes(i, 0);
  t.session_id = q.Bytes(i, 1);
  t.created_utc = q.Bytes(i, 2);
  t.method = q.Bytes(i, 3);
  t.parameters = q.Bytes(i, 4);
  t.through_sequence = static_cast<uint64_t>(q.Int(i, 5));
  t.head_hash = q.Bytes(i, 6);
  t.events = static_cast<uint64_t>(q.Int(i, 7));
  t.retimed = static_cast<uint64_t>(q.Int(i, 8));
  return t;
}

bool IsConnectionError(const absl::Status& s, PgConn* conn) {
  return absl::IsUnavailable(s) || absl::IsResourceExhausted(s) || conn == nullptr || !conn->ok();
}

}  // namespace

bool IsPostgresUrl(std::string_view ledger) {
  return ledger.rfind("postgresql://", 0) == 0 || ledger.rfind("postgres://", 0) == 0;
}

absl::StatusOr<std::unique_ptr<PostgresLedger>> PostgresLedger::Open(const Options& options) {
  Options o = options;
  if (o.instance_id.empty()) o.instance_id = DefaultInstanceId();
  std::unique_ptr<PostgresLedger> l(new PostgresLedger(std::move(o)));
  auto connect = [&]() -> absl::StatusOr<std::unique_ptr<PgConn>> {
    return PgConn::Connect(l->options_.conninfo);
  };
  auto w = connect();
  if (!w.ok()) return w.status();
  l->writer_ = *std::move(w);
  if (absl::Status s = pg::ApplyPgMigrations(l->writer_.get()); !s.ok()) return s;
  // A writer paused inside a transaction (SIGSTOP, a VM freeze) must not
  // keep the lease row locked forever: the server ends its session after a
  // lease's time idle in a transaction (PostgreSQL docs, "Client Connection
  // Defaults": idle_in_transaction_session_timeout).
  if (absl::Status s = l->writer_->Run(
          Cat("SET idle_in_transaction_session_timeout = ", l->options_.lease.count()));
      !s.ok()) {
    return s;
  }
  auto r = connect();
  if (!r.ok()) return r.status();
  l->reader_ = *std::move(r);
  auto ops = connect();
  if (!ops.ok()) return ops.status();
  l->ops_ = *std::move(ops);
  // Taking a lease over waits at most this long for a row lock an old
  // owner's transaction holds.
  if (absl::Status s = l->ops_->Run(Cat("SET lock_timeout = ", l->options_.lease.count() / 2 + 1));
      !s.ok()) {
    return s;
  }
  // Every session's head, for appends without leases (one writer).
  auto heads = l->writer_->Exec(
      "SELECT r.session_id, r.seq, r.hash FROM record r JOIN (SELECT session_id, MAX(seq) AS m "
      "FROM record GROUP BY session_id) x ON r.session_id = x.session_id AND r.seq = x.m");
  if (!heads.ok()) return heads.status();
  {
    std::lock_guard<std::mutex> lock(l->mu_);
    for (int i = 0; i < heads->rows(); ++i) {
      Head h{static_cast<uint64_t>(heads->Int(i, 1)), heads->Bytes(i, 2)};
      l->assigned_[heads->Bytes(i, 0)] = h;
      l->committed_[heads->Bytes(i, 0)] = h;
    }
  }
  l->writer_thread_ = std::thread([raw = l.get()] { raw->WriterLoop(); });
  if (l->options_.leases) l->renewer_thread_ = std::thread([raw = l.get()] { raw->RenewLoop(); });
  l->listener_thread_ = std::thread([raw = l.get()] { raw->ListenLoop(); });
  TM_LOG(kInfo) << "PostgreSQL ledger " << pg::Redacted(l->options_.conninfo) << " (instance "
                << l->options_.instance_id << ", schema " << pg::LatestPgMigration()
                << (l->options_.leases ? Cat(", leases of ", l->options_.lease.count(), " ms")
                                       : std::string(", no leases"))
                << ")";
  return l;
}

PostgresLedger::PostgresLedger(Options options) : options_(std::move(options)) {}

PostgresLedger::~PostgresLedger() { Close(); }

void PostgresLedger::Close() {
  {
    std::lock_guard<std::mutex> lock(mu_);
    closing_ = true;
  }
  work_cv_.notify_all();
  stop_cv_.notify_all();
  if (writer_thread_.joinable()) writer_thread_.join();
  if (renewer_thread_.joinable()) renewer_thread_.join();
  if (listener_thread_.joinable()) listener_thread_.join();
  // The writer is done (nothing of ours is in flight), so the leases can be
  // handed back at once: after a clean stop another instance need not wait
  // for them to expire.
  if (options_.leases) {
    std::lock_guard<std::mutex> o(ops_mu_);
    if (ops_ && ops_->ok()) {
      ops_->Exec(
              "UPDATE session_lease SET expires_at = now() - interval '1 millisecond' WHERE "
              "owner = $1",
              Params().Text(options_.instance_id))
          .IgnoreError();
    }
  }
  std::lock_guard<std::mutex> r(read_mu_);
  reader_.reset();
  std::lock_guard<std::mutex> o(ops_mu_);
  ops_.reset();
  writer_.reset();
}

template <typename T>
T PostgresLedger::OnConn(std::unique_ptr<PgConn>& conn, std::mutex& mu,
                         const std::function<T(PgConn*)>& fn) {
  std::lock_guard<std::mutex> lock(mu);
  for (int attempt = 0;; ++attempt) {
    if (!conn || !conn->ok()) {
      {
        std::lock_guard<std::mutex> l(mu_);
        if (closing_ && !conn) return absl::UnavailableError("ledger is closed");
      }
      auto c = PgConn::Connect(options_.conninfo);
      if (!c.ok()) return c.status();
      conn = *std::move(c);
      if (&conn == &ops_) {
        conn->Run(Cat("SET lock_timeout = ", options_.lease.count() / 2 + 1)).IgnoreError();
      }
    }
    T out = fn(conn.get());
    if (out.ok() || attempt > 0 || conn->ok()) return out;
  }
}

absl::Status PostgresLedger::RunTx(const std::function<absl::Status(PgConn*)>& op) {
  return OnConn<absl::Status>(ops_, ops_mu_, [&](PgConn* c) -> absl::Status {
    if (absl::Status s = c->Run("BEGIN"); !s.ok()) return s;
    absl::Status s = op(c);
    if (s.ok()) s = c->Run("COMMIT");
    if (!s.ok()) c->Run("ROLLBACK").IgnoreError();
    return s;
  });
}

// ---------------------------------------------------------------- appends

absl::StatusOr<uint64_t> PostgresLedger::Append(std::string_view session_id,
                                                std::vector<Record> records, CommitCallback done) {
  uint64_t first = 0;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (closing_) return absl::UnavailableError("ledger is closed");
    auto it = assigned_.find(session_id);
    if (it == assigned_.end()) it = assigned_.emplace(std::string(session_id), Head{}).first;
    Head head = it->second;
    first = head.sequence + 1;
    for (Record& r : records) {
      r.set_session_id(std::string(session_id));
      r.set_sequence(head.sequence + 1);
      auto hash = ChainHash(head.hash.empty() ? std::string(32, '\0') : head.hash, r);
      if (!hash.ok()) return hash.status();
      r.set_hash(*hash);
      head = Head{r.sequence(), *hash};
    }
    it->second = head;
    Work w;
    w.session_id = std::string(session_id);
    w.records = std::move(records);
    w.done = std::move(done);
    queue_.push_back(std::move(w));
  }
  work_cv_.notify_one();
  return first;
}

void PostgresLedger::Barrier(std::function<void()> done) {
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

absl::Status PostgresLedger::Flush() {
  std::promise<void> p;
  auto f = p.get_future();
  Barrier([&p] { p.set_value(); });
  f.wait();
  return WriteHealth();
}

absl::Status PostgresLedger::WriteHealth() {
  std::lock_guard<std::mutex> lock(mu_);
  return health_;
}

void PostgresLedger::SetHealth(absl::Status health) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (health_ == health) return;
    health_ = health;
  }
  if (options_.on_write_health) options_.on_write_health(health);
}

void PostgresLedger::WriterLoop() {
  while (true) {
    std::vector<Work> batch;
    bool failing = false;
    {
      std::unique_lock<std::mutex> lock(mu_);
      auto ready = [this] { return closing_ || !queue_.empty(); };
      if (health_.ok()) {
        work_cv_.wait(lock, ready);
      } else {
        work_cv_.wait_until(lock, next_retry_, ready);
      }
      failing = !health_.ok();
      if (queue_.empty() && closing_) return;
      size_t records = 0;
      while (!queue_.empty() && (batch.empty() || records < options_.max_batch_records)) {
        records += queue_.front().records.size();
        batch.push_back(std::move(queue_.front()));
        queue_.pop_front();
      }
    }
    if (failing && SteadyClock::now() >= next_retry_) TryRecover();
    // Record groups between barriers share one transaction.
    size_t i = 0;
    while (i < batch.size()) {
      if (batch[i].barrier) {
        batch[i++].barrier();
        continue;
      }
      size_t end = i;
      while (end < batch.size() && !batch[end].barrier) ++end;
      std::vector<Work> part(std::make_move_iterator(batch.begin() + static_cast<long>(i)),
                             std::make_move_iterator(batch.begin() + static_cast<long>(end)));
      CommitGroups(part);
      i = end;
    }
  }
}

void PostgresLedger::RechainLocked(const std::string& session, const Head& head,
                                   std::vector<Work>& batch, size_t from) {
  Head h = head;
  auto redo = [&](Work& w) {
    if (w.session_id != session || w.records.empty() || !w.error.ok()) return;
    Head next = h;
    std::vector<std::string> hashes;
    for (Record& r : w.records) {
      r.set_sequence(next.sequence + 1);
      auto hash = ChainHash(next.hash.empty() ? std::string(32, '\0') : next.hash, r);
      if (!hash.ok()) {
        w.error = hash.status();
        return;
      }
      next = Head{r.sequence(), *hash};
      hashes.push_back(*hash);
    }
    for (size_t k = 0; k < w.records.size(); ++k) w.records[k].set_hash(hashes[k]);
    h = next;
  };
  for (size_t j = from; j < batch.size(); ++j) redo(batch[j]);
  for (Work& w : queue_) redo(w);
  assigned_[session] = h;
}

absl::Status PostgresLedger::InsertRecord(const Record& r, uint64_t token) {
  const std::string& sid = r.session_id();
  const auto seq = static_cast<int64_t>(r.sequence());
  auto body = CanonicalBody(r);
  if (!body.ok()) return body.status();
  auto key = ClientKeyOf(r);
  Params p;
  p.Text(sid).Int(seq).Text(RecordKindName(r)).Int(r.written_session_ns());
  if (key) {
    p.Text(key->first).UInt(key->second);
  } else {
    p.Null().Null();
  }
  p.Bytes(*body).Bytes(r.hash()).UInt(token);
  if (auto s = writer_->Exec(
          "INSERT INTO record (session_id, seq, kind, written_session_ns, client_id, client_seq, "
          "body, hash, lease_token) VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9)",
          p);
      !s.ok()) {
    return s.status();
  }
  // Typed rows only where the ledger's reads need columns; every other kind
  // (present or future) lives in the journal alone.
  switch (r.body_case()) {
    case Record::kFeedback: {
      const auto& f = r.feedback();
      return writer_
          ->Exec("INSERT INTO feedback VALUES ($1,$2,$3,$4,$5,$6,$7,$8,$9,$10,$11,$12)",
                 Params()
                     .Text(sid)
                     .Int(seq)
                     .Text(f.client_id())
                     .UInt(f.client_sequence())
                     .Text(f.trainer())
                     .Double(f.value())
                     .Text(f.input())
                     .Int(f.event_source_ns())
                     .Int(f.arrival_session_ns())
                     .Int(f.event_session_ns())
                     .Int(f.uncertainty_ns())
                     .Bool(f.late()))
          .status();
    }
    case Record::kStep: {
      const auto& s = r.step();
      Params q;
      q.Text(sid)
          .Int(seq)
          .Text(s.client_id())
          .UInt(s.client_sequence())
          .Text(s.agent())
          .UInt(s.step_id())
          .UInt(s.episode())
          .Text(s.action())
          .Int(s.start_agent_ns());
      if (s.end_agent_ns() != 0)
        q.Int(s.end_agent_ns());
      else
        q.Null();
      q.Int(s.start_session_ns());
      if (s.end_session_ns() != 0)
        q.Int(s.end_session_ns());
      else
        q.Null();
      q.Int(s.arrival_session_ns()).Int(s.uncertainty_ns()).Int(s.features_size()).Bool(s.late());
      return writer_
          ->Exec("INSERT INTO step VALUES ($1,$2,$3,$4,$5,$6,$7,$8,$9,$10,$11,$12,$13,$14,$15,$16)",
                 q)
          .status();
    }
    case Record::kProbe: {
      const auto& pr = r.probe();
      return writer_
          ->Exec("INSERT INTO probe VALUES ($1,$2,$3,$4,$5,$6,$7,$8,$9,$10,$11,$12)",
                 Params()
                     .Text(sid)
                     .Int(seq)
                     .Text(pr.client_id())
                     .UInt(pr.probe_id())
                     .Int(pr.t1_session_ns())
                     .Int(pr.t2_client_ns())
                     .Int(pr.t3_client_ns())
                     .Int(pr.t4_session_ns())
                     .Int(pr.offset_ns())
                     .Int(pr.delay_ns())
                     .Bool(pr.accepted())
                     .Text(pr.reject_reason()))
          .status();
    }
    case Record::kClientEvent: {
      const auto& c = r.client_event().client();
      return writer_
          ->Exec(
              "INSERT INTO client VALUES ($1,$2,$3,$4,$5,$6,$7,$8,$9,$9) ON CONFLICT "
              "(session_id, client_id) DO UPDATE SET last_seen_session_ns = "
              "excluded.last_seen_session_ns, source_description = "
              "excluded.source_description, software = excluded.software",
              Params()
                  .Text(sid)
                  .Text(c.client_id())
                  .Text(RoleWord(c.role()))
                  .Text(c.subject())
                  .Text(SourceKindWord(c.source_kind()))
                  .Text(c.source_description())
                  .Text(c.software())
                  .Int(seq)
                  .Int(r.written_session_ns()))
          .status();
    }
    case Record::kCalibrationEvent: {
      const auto& e = r.calibration_event();
      return writer_
          ->Exec("INSERT INTO calibration_event VALUES ($1,$2,$3,$4)",
                 Params().Text(sid).Int(seq).Text(e.client_id()).Text(e.run()))
          .status();
    }
    case Record::kCalibration: {
      const auto& c = r.calibration();
      const bool has_chosen = c.chosen() < static_cast<uint32_t>(c.fits_size());
      const std::string family =
          has_chosen ? c.fits(static_cast<int>(c.chosen())).family() : std::string();
      return writer_
          ->Exec("INSERT INTO calibration VALUES ($1,$2,$3,$4,$5,$6,$7,$8,$9,$10)",
                 Params()
                     .Text(c.id())
                     .Text(c.trainer())
                     .Text(sid)
                     .Int(seq)
                     .Int(r.written_session_ns())
                     .Text(family)
                     .Text(c.kernel_description())
                     .Int(c.valid())
                     .Bool(c.warnings_size() > 0)
                     .Text(SourceKindWord(c.source_kind())))
          .status();
    }
    case Record::BODY_NOT_SET:
      return absl::InvalidArgumentError("record has no body");
    default:
      return absl::OkStatus();
  }
}

absl::StatusOr<PostgresLedger::Head> PostgresLedger::LoadHead(PgConn* conn,
                                                              std::string_view session_id) {
  auto q =
      conn->Exec("SELECT seq, hash FROM record WHERE session_id = $1 ORDER BY seq DESC LIMIT 1",
                 Params().Text(session_id));
  if (!q.ok()) return q.status();
  if (q->rows() == 0) return Head{};
  return Head{static_cast<uint64_t>(q->Int(0, 0)), q->Bytes(0, 1)};
}

void PostgresLedger::CommitGroups(std::vector<Work>& batch, bool savepoints) {
  std::vector<absl::Status> results(batch.size());
  std::set<std::string> sessions;
  for (const Work& w : batch) {
    if (!w.records.empty()) sessions.insert(w.session_id);
  }
  std::map<std::string, uint64_t> tokens;   // session -> fencing token checked
  std::map<std::string, std::string> lost;  // session -> the owner now
  absl::Status fatal = WriteHealth();
  if (fatal.ok()) fatal = writer_->Run("BEGIN");
  // Fencing first: the lease row stays locked by this transaction until it
  // ends, so no instance can take the lease over between check and commit.
  if (options_.leases) {
    for (const std::string& session : sessions) {
      if (!fatal.ok()) break;
      uint64_t token = 0;
      {
        std::lock_guard<std::mutex> lock(mu_);
        auto it = owned_.find(session);
        if (it != owned_.end()) token = it->second;
      }
      if (token == 0) {
        lost[session] = "";
        continue;
      }
      auto q = writer_->Exec(
          "UPDATE session_lease SET expires_at = now() + $4::interval WHERE session_id = $1 AND "
          "owner = $2 AND token = $3",
          Params()
              .Text(session)
              .Text(options_.instance_id)
              .UInt(token)
              .Text(Interval(options_.lease)));
      if (!q.ok()) {
        fatal = q.status();
        break;
      }
      if (q->affected() == 0) {
        lost[session] = "?";
        continue;
      }
      tokens[session] = token;
    }
  }
  std::map<std::string, Head> tx_heads;
  // The fast path sends every insert without waiting for each answer
  // (pipeline mode): a round trip per batch rather than per record.
  const bool pipelined = !savepoints && fatal.ok();
  if (pipelined) fatal = writer_->BeginPipeline();
  for (size_t j = 0; fatal.ok() && j < batch.size(); ++j) {
    Work& w = batch[j];
    if (w.records.empty()) continue;
    if (lost.count(w.session_id) != 0) {
      results[j] =
          absl::UnavailableError(Cat("session ", w.session_id,
                                     " is not owned by this instance (its lease was lost or "
                                     "never taken); not stored, send it again to the owner"));
      continue;
    }
    absl::Status s = w.error;
    bool inserted = false;
    if (s.ok()) {
      if (savepoints) {
        if (fatal = writer_->Run("SAVEPOINT append_group"); !fatal.ok()) break;
      }
      const uint64_t token = tokens.count(w.session_id) ? tokens[w.session_id] : 0;
      for (const Record& r : w.records) {
        if (s = InsertRecord(r, token); !s.ok()) break;
      }
      if (s.ok()) {
        if (savepoints) fatal = writer_->Run("RELEASE append_group");
        inserted = fatal.ok();
      } else if (IsConnectionError(s, writer_.get())) {
        fatal = s;
      } else if (!savepoints) {
        // The fast path has no savepoints to undo one group: undo all and
        // do the batch again with one savepoint per group. Nothing was
        // committed or reported yet.
        if (pipelined) writer_->EndPipeline().IgnoreError();
        writer_->Run("ROLLBACK").IgnoreError();
        return CommitGroups(batch, /*savepoints=*/true);
      } else {
        fatal = writer_->Run("ROLLBACK TO append_group");
        if (fatal.ok()) fatal = writer_->Run("RELEASE append_group");
      }
    }
    if (!fatal.ok()) break;
    if (inserted) {
      tx_heads[w.session_id] = Head{w.records.back().sequence(), w.records.back().hash()};
      continue;
    }
    results[j] = absl::Status(s.code(),
                              Cat("record not stored (session ", w.session_id, "): ", s.message()));
    TM_LOG(kWarning) << results[j].message();
    std::lock_guard<std::mutex> lock(mu_);
    auto t = tx_heads.find(w.session_id);
    RechainLocked(w.session_id, t != tx_heads.end() ? t->second : committed_[w.session_id], batch,
                  j + 1);
  }
  // Wakes subscribers on every instance once this commits (NOTIFY is
  // delivered at commit, never for a rolled-back transaction).
  for (const auto& [session, head] : tx_heads) {
    if (!fatal.ok()) break;
    fatal = writer_
                ->Exec("SELECT pg_notify($1, $2)",
                       Params().Text(kNotifyChannel).Text(Cat(head.sequence, " ", session)))
                .status();
  }
  if (pipelined) {
    const absl::Status sent = writer_->EndPipeline();
    if (fatal.ok() && !sent.ok()) {
      if (!IsConnectionError(sent, writer_.get())) {
        // An insert broke a constraint: redo the batch, one savepoint per
        // append, so that only that append fails.
        writer_->Run("ROLLBACK").IgnoreError();
        return CommitGroups(batch, /*savepoints=*/true);
      }
      fatal = sent;
    }
  }
  if (fatal.ok()) fatal = writer_->Run("COMMIT");
  if (!fatal.ok()) {
    writer_->Run("ROLLBACK").IgnoreError();
    absl::Status health = WriteHealth();
    if (health.ok() && IsConnectionError(fatal, writer_.get())) {
      EnterFailing(fatal);
      health = WriteHealth();
    }
    if (health.ok()) health = fatal;
    for (absl::Status& r : results) {
      if (r.ok()) r = health;
    }
    // A COMMIT that broke off may have committed: start each session again
    // from what the database holds (or, unreachable, from what this
    // instance last saw committed).
    std::map<std::string, Head> fresh;
    if (writer_->ok()) {
      for (const std::string& session : sessions) {
        auto h = LoadHead(writer_.get(), session);
        if (h.ok()) fresh[session] = *h;
      }
    }
    std::lock_guard<std::mutex> lock(mu_);
    for (const std::string& session : sessions) {
      auto f = fresh.find(session);
      if (f != fresh.end()) committed_[session] = f->second;
      RechainLocked(session, committed_[session], batch, batch.size());
    }
  } else {
    std::lock_guard<std::mutex> lock(mu_);
    for (auto& [session, head] : tx_heads) committed_[session] = head;
  }
  // Lost leases first, so that the server stops taking this session's
  // streams before the failed appends are answered.
  for (const auto& [session, owner] : lost) {
    if (owner == "?") LeaseLost(session, "");
  }
  for (size_t j = 0; j < batch.size(); ++j) {
    if (batch[j].done) batch[j].done(results[j], batch[j].records);
  }
}

void PostgresLedger::EnterFailing(const absl::Status& cause) {
  const bool full = absl::IsResourceExhausted(cause);
  absl::Status health =
      full ? absl::ResourceExhaustedError(Cat("ledger disk full: ", cause.message()))
           : absl::UnavailableError(Cat("ledger write failed: ", cause.message()));
  TM_LOG(kError) << health.message() << "; appends fail with this error until a retry succeeds";
  failing_since_ = SteadyClock::now();
  backoff_ = options_.retry_initial;
  next_retry_ = failing_since_ + backoff_;
  SetHealth(health);
}

void PostgresLedger::TryRecover() {
  const absl::Status health = WriteHealth();
  auto again = [this](const absl::Status& why) {
    backoff_ = std::min(backoff_ * 2, options_.retry_max);
    next_retry_ = SteadyClock::now() + backoff_;
    TM_LOG(kDebug) << "ledger still failing (" << why.message() << "); next try in "
                   << backoff_.count() << " ms";
  };
  if (!writer_->ok()) {
    auto c = PgConn::Connect(options_.conninfo);
    if (!c.ok()) return again(c.status());
    writer_ = *std::move(c);
    writer_->Run(Cat("SET idle_in_transaction_session_timeout = ", options_.lease.count()))
        .IgnoreError();
  }
  const auto failed_for =
      std::chrono::duration_cast<std::chrono::milliseconds>(SteadyClock::now() - failing_since_);
  if (auto s =
          writer_->Exec("INSERT INTO ledger_event (event, detail) VALUES ($1, $2)",
                        Params()
                            .Text("write_resumed")
                            .Text(Cat("after ", failed_for.count(), " ms of: ", health.message())));
      !s.ok()) {
    return again(s.status());
  }
  TM_LOG(kInfo) << "ledger writes resumed after " << failed_for.count()
                << " ms (were failing: " << health.message() << ")";
  backoff_ = std::chrono::milliseconds(0);
  SetHealth(absl::OkStatus());
}

// ---------------------------------------------------------------- leases

absl::StatusOr<SessionLease> PostgresLedger::AcquireSession(std::string_view session_id) {
  if (!options_.leases) return SessionLease{};
  struct Taken {
    bool owned = false;
    uint64_t token = 0;
    std::string owner_address;
    std::string previous_owner;
    Head head;
  };
  auto taken =
      OnConn<absl::StatusOr<Taken>>(ops_, ops_mu_, [&](PgConn* c) -> absl::StatusOr<Taken> {
        if (absl::Status s = c->Run("BEGIN"); !s.ok()) return s;
        auto fail = [c](absl::Status s) {
          c->Run("ROLLBACK").IgnoreError();
          return s;
        };
        auto prev = c->Exec("SELECT owner FROM session_lease WHERE session_id = $1 FOR UPDATE",
                            Params().Text(session_id));
        if (!prev.ok()) return fail(prev.status());
        const std::string previous = prev->rows() > 0 ? prev->Bytes(0, 0) : std::string();
        auto q = c->Exec(
            "INSERT INTO session_lease (session_id, owner, owner_address, token, expires_at, "
            "acquired_at) VALUES ($1, $2, $3, 1, now() + $4::interval, now()) "
            "ON CONFLICT (session_id) DO UPDATE SET owner = excluded.owner, "
            "owner_address = excluded.owner_address, "
            "token = session_lease.token + CASE WHEN session_lease.owner = excluded.owner THEN 0 "
            "ELSE 1 END, expires_at = excluded.expires_at, "
            "acquired_at = CASE WHEN session_lease.owner = excluded.owner THEN "
            "session_lease.acquired_at ELSE now() END "
            "WHERE session_lease.owner = excluded.owner OR session_lease.expires_at < now() "
            "RETURNING token",
            Params()
                .Text(session_id)
                .Text(options_.instance_id)
                .Text(options_.advertise)
                .Text(Interval(options_.lease)));
        if (!q.ok()) {
          if (absl::IsFailedPrecondition(q.status())) {  // foreign key: no such session
            c->Run("ROLLBACK").IgnoreError();
            return absl::NotFoundError(Cat("no session '", session_id, "'"));
          }
          return fail(q.status());
        }
        Taken t;
        if (q->rows() == 0) {
          auto who = c->Exec("SELECT owner_address FROM session_lease WHERE session_id = $1",
                             Params().Text(session_id));
          if (!who.ok()) return fail(who.status());
          t.owner_address = who->rows() > 0 ? who->Bytes(0, 0) : std::string();
          if (absl::Status s = c->Run("COMMIT"); !s.ok()) return s;
          return t;
        }
        t.owned = true;
        t.token = static_cast<uint64_t>(q->Int(0, 0));
        t.previous_owner = previous;
        if (previous != options_.instance_id) {
          auto e = c->Exec(
              "INSERT INTO lease_event (session_id, owner, owner_address, token, previous_owner) "
              "VALUES ($1, $2, $3, $4, $5)",
              Params()
                  .Text(session_id)
                  .Text(options_.instance_id)
                  .Text(options_.advertise)
                  .UInt(t.token)
                  .Text(previous));
          if (!e.ok()) return fail(e.status());
        }
        auto head = LoadHead(c, session_id);
        if (!head.ok()) return fail(head.status());
        t.head = *head;
        if (absl::Status s = c->Run("COMMIT"); !s.ok()) return s;
        return t;
      });
  if (!taken.ok()) return taken.status();
  SessionLease lease;
  lease.owned = taken->owned;
  lease.token = taken->token;
  lease.owner_address = taken->owned ? options_.advertise : taken->owner_address;
  if (!taken->owned) return lease;
  std::lock_guard<std::mutex> lock(mu_);
  auto it = owned_.find(session_id);
  if (it == owned_.end() || it->second != taken->token) {
    // New to this instance (or taken back): continue the chain from what
    // the database holds, whoever wrote it.
    owned_[std::string(session_id)] = taken->token;
    assigned_[std::string(session_id)] = taken->head;
    committed_[std::string(session_id)] = taken->head;
    if (!taken->previous_owner.empty() && taken->previous_owner != options_.instance_id) {
      TM_LOG(kInfo) << "took over session " << session_id << " from " << taken->previous_owner
                    << " (fencing token " << taken->token << ", continuing after record "
                    << taken->head.sequence << ")";
    }
  }
  return lease;
}

void PostgresLedger::SetLeaseLostHandler(
    std::function<void(const std::string&, const std::string&)> handler) {
  std::lock_guard<std::mutex> lock(mu_);
  on_lease_lost_ = std::move(handler);
}

void PostgresLedger::SetRemoteCommitHandler(std::function<void(const std::string&, uint64_t)> h) {
  std::lock_guard<std::mutex> lock(mu_);
  on_remote_commit_ = std::move(h);
}

void PostgresLedger::LeaseLost(const std::string& session, const std::string& owner_address) {
  std::function<void(const std::string&, const std::string&)> handler;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (owned_.erase(session) == 0) return;
    handler = on_lease_lost_;
  }
  std::string owner = owner_address;
  if (owner.empty()) {
    auto who = OnConn<absl::StatusOr<std::string>>(
        reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::string> {
          auto q = c->Exec("SELECT owner_address FROM session_lease WHERE session_id = $1",
                           Params().Text(session));
          if (!q.ok()) return q.status();
          return q->rows() > 0 ? q->Bytes(0, 0) : std::string();
        });
    if (who.ok()) owner = *who;
  }
  TM_LOG(kWarning) << "lost the lease of session " << session << " (now owned by "
                   << (owner.empty() ? "nobody known" : owner) << "); its streams move there";
  if (handler) handler(session, owner);
}

void PostgresLedger::RenewLoop() {
  const auto period = std::max(options_.lease / 3, std::chrono::milliseconds(10));
  std::unique_lock<std::mutex> lock(mu_);
  while (!closing_) {
    stop_cv_.wait_for(lock, period, [this] { return closing_; });
    if (closing_) break;
    std::map<std::string, uint64_t> mine(owned_.begin(), owned_.end());
    lock.unlock();
    if (!mine.empty()) {
      auto renewed = OnConn<absl::StatusOr<std::map<std::string, uint64_t>>>(
          ops_, ops_mu_, [&](PgConn* c) -> absl::StatusOr<std::map<std::string, uint64_t>> {
            auto q = c->Exec(
                "UPDATE session_lease SET expires_at = now() + $2::interval WHERE owner = $1 "
                "RETURNING session_id, token",
                Params().Text(options_.instance_id).Text(Interval(options_.lease)));
            if (!q.ok()) return q.status();
            std::map<std::string, uint64_t> out;
            for (int i = 0; i < q->rows(); ++i) {
              out[q->Bytes(i, 0)] = static_cast<uint64_t>(q->Int(i, 1));
            }
            return out;
          });
      if (renewed.ok()) {
        for (const auto& [session, token] : mine) {
          auto it = renewed->find(session);
          if (it == renewed->end() || it->second != token) LeaseLost(session, "");
        }
      } else {
        TM_LOG(kWarning) << "lease renewal failed: " << renewed.status().message();
      }
    }
    lock.lock();
  }
}

void PostgresLedger::ListenLoop() {
  std::unique_ptr<PgConn> conn;
  std::unique_lock<std::mutex> lock(mu_);
  while (!closing_) {
    lock.unlock();
    if (!conn || !conn->ok()) {
      auto c = PgConn::Connect(options_.conninfo);
      if (c.ok() && (*c)->Run(Cat("LISTEN ", kNotifyChannel)).ok()) {
        conn = *std::move(c);
      } else {
        conn.reset();
      }
    }
    if (conn) {
      pollfd p{conn->socket(), POLLIN, 0};
      if (poll(&p, 1, 100) > 0) {
        if (PQconsumeInput(conn->raw()) == 0) conn.reset();
      }
      std::vector<std::pair<std::string, uint64_t>> seen;
      while (conn) {
        PGnotify* n = PQnotifies(conn->raw());
        if (n == nullptr) break;
        std::string payload = n->extra != nullptr ? n->extra : "";
        PQfreemem(n);
        const size_t sp = payload.find(' ');
        if (sp == std::string::npos) continue;
        seen.emplace_back(payload.substr(sp + 1), std::strtoull(payload.c_str(), nullptr, 10));
      }
      std::function<void(const std::string&, uint64_t)> handler;
      {
        std::lock_guard<std::mutex> l(mu_);
        handler = on_remote_commit_;
      }
      if (handler) {
        for (const auto& [session, seq] : seen) handler(session, seq);
      }
    }
    lock.lock();
    if (!conn) stop_cv_.wait_for(lock, std::chrono::milliseconds(200), [this] { return closing_; });
  }
}

// ---------------------------------------------------------------- sessions, tokens

absl::Status PostgresLedger::CreateSession(const SessionRow& row) {
  // Studies and sessions made under them are kept by the SQLite ledger only
  // (deploy/README.md, "Limits today"): refuse rather than store a study's
  // journal as an ordinary session.
  if (row.kind != "session" || !row.condition.empty() || !row.participants.empty()) {
    return absl::UnimplementedError("studies need the SQLite ledger; this server uses PostgreSQL");
  }
  return RunTx([&](PgConn* c) {
    return c
        ->Exec(
            "INSERT INTO session (id, title, study, state, opened_session_ns, utc_anchor_ns, "
            "mono_anchor_ns, boot_id, pin_kernels) VALUES ($1, $2, $3, 'open', $4, $5, $6, "
            "$7, $8)",
            Params()
                .Text(row.id)
                .Text(row.title)
                .Text(row.study)
                .Int(row.opened_session_ns)
                .Int(row.utc_anchor_ns)
                .Int(row.mono_anchor_ns)
                .Text(row.boot_id)
                .Bool(row.pin_kernels))
        .status();
  });
}

absl::StatusOr<SessionRow> PostgresLedger::GetSession(std::string_view id) {
  return OnConn<absl::StatusOr<SessionRow>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<SessionRow> {
        auto q = c->Exec(Cat("SELECT ", kSessionColumns, " FROM session WHERE id = $1"),
                         Params().Text(id));
        if (!q.ok()) return q.status();
        if (q->rows() == 0) return absl::NotFoundError(Cat("no session '", id, "'"));
        return SessionFrom(*q, 0);
      });
}

absl::StatusOr<std::vector<SessionRow>> PostgresLedger::ListSessions(bool include_closed) {
  return OnConn<absl::StatusOr<std::vector<SessionRow>>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::vector<SessionRow>> {
        auto q = c->Exec(Cat("SELECT ", kSessionColumns, " FROM session ",
                             include_closed ? "" : "WHERE state = 'open' ",
                             "ORDER BY opened_session_ns, id"));
        if (!q.ok()) return q.status();
        std::vector<SessionRow> out;
        for (int i = 0; i < q->rows(); ++i) out.push_back(SessionFrom(*q, i));
        return out;
      });
}

absl::Status PostgresLedger::CloseSession(std::string_view id, int64_t closed_session_ns) {
  return RunTx([&](PgConn* c) -> absl::Status {
    auto q = c->Exec("UPDATE session SET state = 'closed', closed_session_ns = $1 WHERE id = $2",
                     Params().Int(closed_session_ns).Text(id));
    if (!q.ok()) return q.status();
    if (q->affected() == 0) return absl::NotFoundError(Cat("no session '", id, "'"));
    return absl::OkStatus();
  });
}

absl::Status PostgresLedger::ReanchorSession(std::string_view id, int64_t utc_anchor_ns,
                                             int64_t mono_anchor_ns, std::string_view boot_id) {
  return RunTx([&](PgConn* c) {
    return c
        ->Exec(
            "UPDATE session SET utc_anchor_ns = $1, mono_anchor_ns = $2, boot_id = $3 WHERE "
            "id = $4",
            Params().Int(utc_anchor_ns).Int(mono_anchor_ns).Text(boot_id).Text(id))
        .status();
  });
}

absl::Status PostgresLedger::PutToken(const TokenRow& row) {
  return RunTx([&](PgConn* c) {
    Params p;
    p.Text(row.id);
    if (row.session_id.empty()) {
      p.Null();
    } else {
      p.Text(row.session_id);
    }
    p.Text(RoleWord(row.role))
        .Text(row.subject)
        .Bytes(row.hash)
        .Int(row.issued_session_ns)
        .Bool(row.revoked);
    return c
        ->Exec(
            "INSERT INTO token (id, session_id, role, subject, secret_sha256, "
            "issued_session_ns, revoked) VALUES ($1, $2, $3, $4, $5, $6, $7)",
            p)
        .status();
  });
}

absl::StatusOr<TokenRow> PostgresLedger::FindTokenByHash(std::string_view hash) {
  return OnConn<absl::StatusOr<TokenRow>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<TokenRow> {
        auto q = c->Exec(Cat("SELECT ", kTokenColumns, " FROM token WHERE secret_sha256 = $1"),
                         Params().Bytes(hash));
        if (!q.ok()) return q.status();
        if (q->rows() == 0) return absl::NotFoundError("unknown token");
        return TokenFrom(*q, 0);
      });
}

absl::StatusOr<std::vector<TokenRow>> PostgresLedger::ListTokens(std::string_view session_id) {
  return OnConn<absl::StatusOr<std::vector<TokenRow>>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::vector<TokenRow>> {
        auto q = c->Exec(Cat("SELECT ", kTokenColumns,
                             " FROM token WHERE session_id = $1 ORDER BY issued_session_ns, id"),
                         Params().Text(session_id));
        if (!q.ok()) return q.status();
        std::vector<TokenRow> out;
        for (int i = 0; i < q->rows(); ++i) out.push_back(TokenFrom(*q, i));
        return out;
      });
}

absl::StatusOr<TokenRow> PostgresLedger::RevokeToken(std::string_view session_id,
                                                     std::string_view token_id) {
  TokenRow out;
  absl::Status s = RunTx([&](PgConn* c) -> absl::Status {
    auto q = c->Exec(Cat("UPDATE token SET revoked = true WHERE id = $1 AND session_id = $2 "
                         "RETURNING ",
                         kTokenColumns),
                     Params().Text(token_id).Text(session_id));
    if (!q.ok()) return q.status();
    if (q->rows() == 0) {
      return absl::NotFoundError(Cat("no token '", token_id, "' in session '", session_id, "'"));
    }
    out = TokenFrom(*q, 0);
    return absl::OkStatus();
  });
  if (!s.ok()) return s;
  return out;
}

// ---------------------------------------------------------------- reads

absl::StatusOr<std::vector<Record>> PostgresLedger::Read(std::string_view session_id, uint64_t from,
                                                         size_t max) {
  return OnConn<absl::StatusOr<std::vector<Record>>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::vector<Record>> {
        auto q = c->Exec(
            "SELECT body, hash FROM record WHERE session_id = $1 AND seq >= $2 ORDER BY seq "
            "LIMIT $3",
            Params().Text(session_id).UInt(from).UInt(max));
        if (!q.ok()) return q.status();
        return RecordsFrom(*q, session_id);
      });
}

absl::StatusOr<std::optional<uint64_t>> PostgresLedger::FindClientSequence(
    std::string_view session_id, std::string_view client_id, uint64_t client_sequence) {
  return OnConn<absl::StatusOr<std::optional<uint64_t>>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::optional<uint64_t>> {
        auto q = c->Exec(
            "SELECT seq FROM record WHERE session_id = $1 AND client_id = $2 AND client_seq = $3",
            Params().Text(session_id).Text(client_id).UInt(client_sequence));
        if (!q.ok()) return q.status();
        if (q->rows() == 0) return std::optional<uint64_t>();
        return std::optional<uint64_t>(static_cast<uint64_t>(q->Int(0, 0)));
      });
}

absl::StatusOr<uint64_t> PostgresLedger::LastClientSequence(std::string_view session_id,
                                                            std::string_view client_id) {
  return OnConn<absl::StatusOr<uint64_t>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<uint64_t> {
        auto q = c->Exec(
            "SELECT COALESCE(MAX(client_seq), 0)::bigint FROM record WHERE session_id = $1 AND "
            "client_id = $2 AND client_seq IS NOT NULL",
            Params().Text(session_id).Text(client_id));
        if (!q.ok()) return q.status();
        return static_cast<uint64_t>(q->Int(0, 0));
      });
}

absl::StatusOr<RecordCounts> PostgresLedger::Counts(std::string_view session_id) {
  return OnConn<absl::StatusOr<RecordCounts>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<RecordCounts> {
        auto q = c->Exec(
            "SELECT (SELECT COUNT(*) FROM record WHERE session_id = $1 AND kind = 'feedback'),"
            " (SELECT COUNT(*) FROM record WHERE session_id = $1 AND kind = 'step'),"
            " (SELECT COUNT(*) FROM record WHERE session_id = $1 AND kind = 'probe'),"
            " (SELECT COUNT(*) FROM record WHERE session_id = $1 AND kind = 'marker'),"
            " (SELECT COUNT(*) FROM client WHERE session_id = $1),"
            " (SELECT COUNT(*) FROM feedback WHERE session_id = $1 AND late)"
            "  + (SELECT COUNT(*) FROM step WHERE session_id = $1 AND late),"
            " (SELECT COUNT(*) FROM record WHERE session_id = $1 AND kind = 'unmatched'),"
            " (SELECT COUNT(*) FROM probe WHERE session_id = $1 AND NOT accepted)",
            Params().Text(session_id));
        if (!q.ok()) return q.status();
        RecordCounts n;
        n.feedback = static_cast<uint64_t>(q->Int(0, 0));
        n.steps = static_cast<uint64_t>(q->Int(0, 1));
        n.probes = static_cast<uint64_t>(q->Int(0, 2));
        n.markers = static_cast<uint64_t>(q->Int(0, 3));
        n.clients = static_cast<uint64_t>(q->Int(0, 4));
        n.late = static_cast<uint64_t>(q->Int(0, 5));
        n.unmatched = static_cast<uint64_t>(q->Int(0, 6));
        n.rejected_probes = static_cast<uint64_t>(q->Int(0, 7));
        return n;
      });
}

uint64_t PostgresLedger::CommittedSequence(std::string_view session_id) {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = committed_.find(session_id);
  return it == committed_.end() ? 0 : it->second.sequence;
}

absl::StatusOr<std::vector<Record>> PostgresLedger::ReadCalibrationEvents(
    std::string_view session_id, std::string_view client_id, std::string_view run) {
  return OnConn<absl::StatusOr<std::vector<Record>>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::vector<Record>> {
        auto q = c->Exec(
            "SELECT r.body, r.hash FROM calibration_event e JOIN record r ON r.session_id = "
            "e.session_id AND r.seq = e.seq WHERE e.session_id = $1 AND e.client_id = $2 AND "
            "e.run = $3 ORDER BY e.seq",
            Params().Text(session_id).Text(client_id).Text(run));
        if (!q.ok()) return q.status();
        return RecordsFrom(*q, session_id);
      });
}

absl::StatusOr<std::vector<CalibrationRow>> PostgresLedger::ListCalibrations(
    std::string_view trainer) {
  return OnConn<absl::StatusOr<std::vector<CalibrationRow>>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::vector<CalibrationRow>> {
        auto q = c->Exec(
            "SELECT id, trainer, session_id, seq, created_session_ns, family, "
            "kernel_description, valid, warning, source_kind FROM calibration WHERE $1 = '' OR "
            "trainer = $1 ORDER BY created_session_ns DESC, id DESC",
            Params().Text(trainer));
        if (!q.ok()) return q.status();
        std::vector<CalibrationRow> out;
        for (int i = 0; i < q->rows(); ++i) out.push_back(CalibrationFrom(*q, i));
        return out;
      });
}

absl::StatusOr<Record> PostgresLedger::GetCalibration(std::string_view id) {
  return OnConn<absl::StatusOr<Record>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<Record> {
        auto q = c->Exec(
            "SELECT r.body, r.hash, c.session_id FROM calibration c JOIN record r ON "
            "r.session_id = c.session_id AND r.seq = c.seq WHERE c.id = $1",
            Params().Text(id));
        if (!q.ok()) return q.status();
        if (q->rows() == 0) return absl::NotFoundError(Cat("no calibration '", id, "'"));
        return RecordFrom(*q, 0, 0, q->Bytes(0, 2));
      });
}

absl::StatusOr<std::optional<Record>> PostgresLedger::LatestCalibration(std::string_view trainer) {
  return OnConn<absl::StatusOr<std::optional<Record>>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::optional<Record>> {
        auto q = c->Exec(
            "SELECT r.body, r.hash, c.session_id FROM calibration c JOIN record r ON "
            "r.session_id = c.session_id AND r.seq = c.seq WHERE c.trainer = $1 ORDER BY "
            "c.created_session_ns DESC, c.id DESC LIMIT 1",
            Params().Text(trainer));
        if (!q.ok()) return q.status();
        if (q->rows() == 0) return std::optional<Record>();
        auto r = RecordFrom(*q, 0, 0, q->Bytes(0, 2));
        if (!r.ok()) return r.status();
        return std::optional<Record>(*std::move(r));
      });
}

// ---------------------------------------------------------------- derived sets, time sets

absl::Status PostgresLedger::PutDerivedSet(std::string_view session_id, std::string_view name,
                                           std::string_view spec,
                                           const std::vector<Record>& records, bool overwrite) {
  return RunTx([&](PgConn* c) -> absl::Status {
    auto have = c->Exec("SELECT COUNT(*) FROM derived_set WHERE session_id = $1 AND name = $2",
                        Params().Text(session_id).Text(name));
    if (!have.ok()) return have.status();
    if (have->Int(0, 0) > 0 && !overwrite) {
      return absl::AlreadyExistsError(
          Cat("derived set '", name, "' exists in session ", session_id, " (ask to overwrite it)"));
    }
    for (const char* sql : {"DELETE FROM derived_record WHERE session_id = $1 AND derived_set = $2",
                            "DELETE FROM derived_set WHERE session_id = $1 AND name = $2"}) {
      if (auto d = c->Exec(sql, Params().Text(session_id).Text(name)); !d.ok()) return d.status();
    }
    if (auto i = c->Exec("INSERT INTO derived_set (session_id, name, spec) VALUES ($1, $2, $3)",
                         Params().Text(session_id).Text(name).Text(spec));
        !i.ok()) {
      return i.status();
    }
    int64_t seq = 0;
    for (const Record& r : records) {
      if (!r.has_credit() && !r.has_label() && !r.has_unmatched()) {
        return absl::InvalidArgumentError(
            "a derived set holds credit, label and unmatched records");
      }
      Record copy = r;
      copy.set_session_id(std::string(session_id));
      std::string body;
      if (!copy.SerializeToString(&body)) return absl::InternalError("cannot serialise a record");
      if (auto i = c->Exec("INSERT INTO derived_record VALUES ($1, $2, $3, $4, $5)",
                           Params()
                               .Text(session_id)
                               .Text(name)
                               .Int(++seq)
                               .Text(RecordKindName(copy))
                               .Bytes(body));
          !i.ok()) {
        return i.status();
      }
    }
    return absl::OkStatus();
  });
}

absl::Status PostgresLedger::PutTimeSet(const TimeSetRow& set,
                                        const std::vector<DerivedTimeRow>& times) {
  return RunTx([&](PgConn* c) -> absl::Status {
    auto have = c->Exec("SELECT COUNT(*) FROM time_set WHERE id = $1", Params().Text(set.id));
    if (!have.ok()) return have.status();
    if (have->Int(0, 0) > 0) return absl::AlreadyExistsError(Cat("time set '", set.id, "' exists"));
    if (auto i = c->Exec(
            "INSERT INTO time_set (id, session_id, created_utc, method, parameters, through_seq, "
            "head_hash, events, retimed) VALUES ($1, $2, to_char(now() AT TIME ZONE 'UTC', "
            "'YYYY-MM-DD\"T\"HH24:MI:SS.MS\"Z\"'), $3, $4, $5, $6, $7, $8)",
            Params()
                .Text(set.id)
                .Text(set.session_id)
                .Text(set.method)
                .Text(set.parameters)
                .UInt(set.through_sequence)
                .Bytes(set.head_hash)
                .UInt(set.events)
                .UInt(set.retimed));
        !i.ok()) {
      return i.status();
    }
    for (const DerivedTimeRow& t : times) {
      if (auto i = c->Exec(
              "INSERT INTO derived_time (time_set, session_id, seq, kind, client_id, "
              "event_session_ns, uncertainty_ns, live_session_ns, live_uncertainty_ns, outcome, "
              "probes) VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11)",
              Params()
                  .Text(set.id)
                  .Text(set.session_id)
                  .UInt(t.sequence)
                  .Text(t.kind)
                  .Text(t.client_id)
                  .Int(t.event_session_ns)
                  .Int(t.uncertainty_ns)
                  .Int(t.live_session_ns)
                  .Int(t.live_uncertainty_ns)
                  .Text(t.outcome)
                  .Int(t.probes));
          !i.ok()) {
        return i.status();
      }
    }
    return absl::OkStatus();
  });
}

absl::Status PostgresLedger::PutReceipt(const tickmark::v1::Receipt& receipt,
                                        std::string_view public_key_pem) {
  return RunTx([&](PgConn* c) {
    Params p;
    p.Text(receipt.session_id())
        .UInt(receipt.last_sequence())
        .Bytes(receipt.head_hash())
        .Int(receipt.chain_version())
        .Text(receipt.signed_utc())
        .Bytes(receipt.message())
        .Bytes(receipt.signature())
        .Bytes(receipt.public_key_sha256())
        .Text(public_key_pem);
    return c
        ->Exec(
            "INSERT INTO receipt (session_id, last_seq, head_hash, chain_version, signed_utc, "
            "message, signature, public_key_sha256, public_key_pem) "
            "VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9) ON CONFLICT (session_id) DO UPDATE SET "
            "last_seq = EXCLUDED.last_seq, head_hash = EXCLUDED.head_hash, "
            "chain_version = EXCLUDED.chain_version, signed_utc = EXCLUDED.signed_utc, "
            "message = EXCLUDED.message, signature = EXCLUDED.signature, "
            "public_key_sha256 = EXCLUDED.public_key_sha256, "
            "public_key_pem = EXCLUDED.public_key_pem",
            p)
        .status();
  });
}

absl::StatusOr<std::optional<tickmark::v1::Receipt>> PostgresLedger::GetReceipt(
    std::string_view session_id) {
  using Out = absl::StatusOr<std::optional<tickmark::v1::Receipt>>;
  return OnConn<Out>(reader_, read_mu_, [&](PgConn* c) -> Out {
    auto q = c->Exec(
        "SELECT session_id, last_seq, head_hash, chain_version, signed_utc, message, signature, "
        "public_key_sha256 FROM receipt WHERE session_id = $1",
        Params().Text(session_id));
    if (!q.ok()) return q.status();
    if (q->rows() == 0) return std::optional<tickmark::v1::Receipt>();
    tickmark::v1::Receipt r;
    r.set_session_id(q->Bytes(0, 0));
    r.set_last_sequence(static_cast<uint64_t>(q->Int(0, 1)));
    r.set_head_hash(q->Bytes(0, 2));
    r.set_chain_version(static_cast<uint32_t>(q->Int(0, 3)));
    r.set_signed_utc(q->Bytes(0, 4));
    r.set_message(q->Bytes(0, 5));
    r.set_signature(q->Bytes(0, 6));
    r.set_public_key_sha256(q->Bytes(0, 7));
    return std::optional<tickmark::v1::Receipt>(std::move(r));
  });
}

absl::StatusOr<std::vector<TimeSetRow>> PostgresLedger::ListTimeSets(std::string_view session_id) {
  return OnConn<absl::StatusOr<std::vector<TimeSetRow>>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::vector<TimeSetRow>> {
        auto q = c->Exec(Cat("SELECT ", kTimeSetColumns,
                             " FROM time_set WHERE session_id = $1 ORDER BY ord DESC"),
                         Params().Text(session_id));
        if (!q.ok()) return q.status();
        std::vector<TimeSetRow> out;
        for (int i = 0; i < q->rows(); ++i) out.push_back(TimeSetFrom(*q, i));
        return out;
      });
}

absl::StatusOr<TimeSetRow> PostgresLedger::GetTimeSet(std::string_view id) {
  return OnConn<absl::StatusOr<TimeSetRow>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<TimeSetRow> {
        auto q = c->Exec(Cat("SELECT ", kTimeSetColumns, " FROM time_set WHERE id = $1"),
                         Params().Text(id));
        if (!q.ok()) return q.status();
        if (q->rows() == 0) return absl::NotFoundError(Cat("no time set '", id, "'"));
        return TimeSetFrom(*q, 0);
      });
}

absl::StatusOr<std::vector<DerivedTimeRow>> PostgresLedger::ReadDerivedTimes(
    std::string_view time_set) {
  return OnConn<absl::StatusOr<std::vector<DerivedTimeRow>>>(
      reader_, read_mu_, [&](PgConn* c) -> absl::StatusOr<std::vector<DerivedTimeRow>> {
        auto q = c->Exec(
            "SELECT seq, kind, client_id, event_session_ns, uncertainty_ns, live_session_ns, "
            "live_uncertainty_ns, outcome, probes FROM derived_time WHERE time_set = $1 "
            "ORDER BY seq, kind",
            Params().Text(time_set));
        if (!q.ok()) return q.status();
        std::vector<DerivedTimeRow> out;
        for (int i = 0; i < q->rows(); ++i) {
          DerivedTimeRow t;
          t.sequence = static_cast<uint64_t>(q->Int(i, 0));
          t.kind = q->Bytes(i, 1);
          t.client_id = q->Bytes(i, 2);
          t.event_session_ns = q->Int(i, 3);
          t.uncertainty_ns = q->Int(i, 4);
          t.live_session_ns = q->Int(i, 5);
          t.live_uncertainty_ns = q->Int(i, 6);
          t.outcome = q->Bytes(i, 7);
          t.probes = static_cast<uint32_t>(q->Int(i, 8));
          out.push_back(std::move(t));
        }
        return out;
      });
}

}  // namespace tickmark::ledger

#include "server/ledger/sqlite/sqlite_ledger.h"

#include <sqlite3.h>
#include <sys/statvfs.h>

#include <filesystem>
#include <future>
#include <set>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/ledger/sqlite/enum_names.h"
#include "server/ledger/sqlite/migration_runner.h"
#include "server/ledger/sqlite/read_connection.h"
#include "server/ledger/sqlite/startup_checks.h"
#include "server/ledger/sqlite/statement.h"
#include "server/ledger/sqlite/typed_tables.h"
#include "server/ops/server_metrics.h"

namespace tickmark::ledger {
namespace {

using tickmark::v1::Record;
using SteadyClock = std::chrono::steady_clock;

// Under synchronous=NORMAL the side file is rewritten at most this often,
// and within this time of a commit (WriteHeadsIfDue); common practice, no
// source: well under a human's reaction time, and ~20 batches' worth of
// rewrites saved.
constexpr std::chrono::milliseconds kHeadsInterval{20};

absl::StatusOr<sqlite3*> OpenDb(const std::string& path, bool full) {
  sqlite3* db = nullptr;
  const int flags = SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE | SQLITE_OPEN_NOMUTEX;
  if (sqlite3_open_v2(path.c_str(), &db, flags, nullptr) != SQLITE_OK) {
    absl::Status s = db ? SqlError(db, Cat("cannot open ledger ", path))
                        : absl::UnavailableError(Cat("cannot open ledger ", path, ": no memory"));
    sqlite3_close(db);
    return s;
  }
  sqlite3_busy_timeout(db, 5000);
  // secure_delete: deleted content (an erased participant's, docs/audit.md)
  // is overwritten with zeros rather than left in free pages (SQLite docs,
  // PRAGMA secure_delete).
  absl::Status s =
      Exec(db, "PRAGMA journal_mode=WAL; PRAGMA foreign_keys=ON; PRAGMA secure_delete=ON;");
  if (s.ok()) s = Exec(db, full ? "PRAGMA synchronous=FULL;" : "PRAGMA synchronous=NORMAL;");
  if (!s.ok()) {
    sqlite3_close(db);
    return s;
  }
  return db;
}

// Free bytes for an unprivileged writer on the file system holding `path`.
uint64_t FreeBytes(const std::string& path) {
  std::string dir = std::filesystem::path(path).parent_path().string();
  struct statvfs st {};
  if (statvfs(dir.empty() ? "." : dir.c_str(), &st) != 0) return UINT64_MAX;
  return static_cast<uint64_t>(st.f_bavail) * st.f_frsize;
}

}  // namespace

absl::StatusOr<std::unique_ptr<SqliteLedger>> SqliteLedger::Open(const Options& options) {
  std::vector<std::string> evidence = options.evidence_files;
  evidence.push_back(HeadsPath(options.path));
  evidence.push_back(options.path + "-wal");
  bool is_new = false, replaces_old = false;
  if (absl::Status s = CheckLedgerPresence(options.path, evidence, options.allow_new_ledger,
                                           &is_new, &replaces_old);
      !s.ok()) {
    return s;
  }
  if (replaces_old) {
    // An old WAL belongs to a ledger that is gone; SQLite must not apply it
    // to the new file. It is kept aside, not deleted: it may be evidence.
    std::error_code ec;
    if (std::filesystem::exists(options.path + "-wal", ec)) {
      std::filesystem::rename(options.path + "-wal", options.path + "-wal.replaced", ec);
      if (ec)
        return absl::UnavailableError(
            Cat("cannot move the old ", options.path, "-wal aside: ", ec.message()));
      TM_LOG(kWarning) << "the old " << options.path << "-wal is kept as " << options.path
                       << "-wal.replaced";
    }
    std::filesystem::remove(options.path + "-shm", ec);
  }
  if (!is_new) {
    if (absl::Status s = CheckFileLength(options.path); !s.ok()) return s;
  }
  auto damaged = [&](const absl::Status& s) {
    return absl::IsDataLoss(s) ? DamagedLedger(options.path, std::string(s.message())) : s;
  };
  auto writer = OpenDb(options.path, options.synchronous_full);
  if (!writer.ok()) return damaged(writer.status());
  std::unique_ptr<SqliteLedger> ledger(new SqliteLedger(options, *writer));
  if (!is_new) {
    if (absl::Status s = QuickCheck(*writer, options.path, options.quick_check_limit); !s.ok()) {
      return s;
    }
  }
  if (absl::Status s = ApplyMigrations(*writer); !s.ok()) return damaged(s);
  auto reader = OpenDb(options.path, options.synchronous_full);
  if (!reader.ok()) return damaged(reader.status());
  ledger->reads_ = std::make_unique<ReadConnection>(*reader);
  auto checkpoints = OpenDb(options.path, options.synchronous_full);
  if (!checkpoints.ok()) return damaged(checkpoints.status());
  ledger->checkpointer_ = std::make_unique<Checkpointer>(
      *checkpoints, *writer, options.wal_restart_pages, options.wal_backstop_pages);
  if (absl::Status s = ledger->LoadHeads(); !s.ok()) return damaged(s);
  if (is_new) {
    if (replaces_old) {
      ledger->NoteLedgerEvent("new_ledger", "started empty over the traces of an earlier ledger")
          .IgnoreError();
    }
  } else if (absl::Status s = ledger->CheckSideFile(); !s.ok()) {
    return s;
  }
  if (absl::Status s = ledger->heads_file_.Write(ledger->committed_); !s.ok()) {
    TM_LOG(kWarning) << "ledger side file not written (lost records will go unnoticed): "
                     << s.message();
  }
  if (absl::Status s = ledger->reserve_.Create(); !s.ok()) {
    TM_LOG(kWarning) << "no reserve file, so a full disk may leave no room to record it: "
                     << s.message();
  }
  ledger->tables_ = std::make_unique<TypedTables>(*writer);
  ledger->writer_ = std::thread([l = ledger.get()] { l->WriterLoop(); });
  return ledger;
}

SqliteLedger::SqliteLedger(Options options, sqlite3* writer)
    : options_(std::move(options)),
      writer_db_(writer),
      heads_file_(HeadsPath(options_.path), options_.synchronous_full),
      reserve_(ReservePath(options_.path), options_.reserve_bytes) {}

SqliteLedger::~SqliteLedger() { Close(); }

absl::Status SqliteLedger::LoadHeads() {
  Statement q(writer_db_,
              "SELECT r.session_id, r.seq, r.hash FROM record r JOIN "
              "(SELECT session_id, MAX(seq) AS m FROM record GROUP BY session_id) x "
              "ON r.session_id = x.session_id AND r.seq = x.m");
  std::lock_guard<std::mutex> lock(mu_);
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    SessionHead head{static_cast<uint64_t>(q.Int(1)), q.Blob(2)};
    assigned_[q.Text(0)] = head;
    committed_[q.Text(0)] = head;
  }
  Statement v(writer_db_, "SELECT id, chain_version FROM session");
  while (true) {
    auto row = v.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    chain_versions_[v.Text(0)] = static_cast<uint32_t>(v.Int(1));
  }
  return absl::OkStatus();
}

absl::Status SqliteLedger::CheckSideFile() {
  auto side = heads_file_.Read();
  if (absl::IsNotFound(side.status())) return absl::OkStatus();  // first start with one
  if (!side.ok()) {
    if (options_.accept_lost_records) {
      TM_LOG(kWarning) << side.status().message() << "; rebuilding it from the ledger as asked";
      return absl::OkStatus();
    }
    return absl::DataLossError(Cat(side.status().message(),
                                   "; cannot tell whether the ledger lost records. Start once with "
                                   "--accept-lost-records to rebuild it from the ledger."));
  }
  // The ledger's chain at the side file's sequences (it may be ahead: the
  // side file is written after each commit, so a crash can leave it behind).
  SessionHeads at;
  for (const auto& [id, want] : *side) {
    auto it = committed_.find(id);
    if (it == committed_.end()) continue;
    if (it->second.sequence > want.sequence && want.sequence > 0) {
      Statement q(writer_db_, "SELECT hash FROM record WHERE session_id = ? AND seq = ?");
      auto row = q.Bind(id).Bind(want.sequence).Step();
      if (!row.ok()) return row.status();
      at[id] = SessionHead{want.sequence, *row ? q.Blob(0) : std::string()};
    } else {
      at[id] = it->second;
    }
  }
  std::vector<std::string> findings = CompareHeads(*side, at);
  if (findings.empty()) return absl::OkStatus();
  if (!options_.accept_lost_records) {
    return LostRecords(options_.path, heads_file_.path(), findings);
  }
  std::string all;
  for (const std::string& f : findings) {
    TM_LOG(kWarning) << "ledger " << options_.path << ": accepting lost records: " << f;
    all += Cat(all.empty() ? "" : "; ", f);
  }
  return NoteLedgerEvent("records_lost_accepted", all);
}

absl::Status SqliteLedger::NoteLedgerEvent(const char* event, const std::string& detail) {
  Statement q(writer_db_, "INSERT INTO ledger_event (event, detail) VALUES (?, ?)");
  return q.Bind(event).Bind(detail).Run();
}

void SqliteLedger::Close() {
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (closing_ && !writer_.joinable()) return;
    closing_ = true;
  }
  work_cv_.notify_all();
  if (writer_.joinable()) writer_.join();
  checkpointer_.reset();  // before the writer's connection, which makes the last checkpoint
  tables_.reset();        // finalise its statements before closing the connection
  cached_.clear();
  if (reads_) reads_->Close();
  // A clean close checkpoints the WAL into the main file (unless writes are
  // failing: then EnterFailing turned that off and the WAL stays, intact).
  if (writer_db_ != nullptr) sqlite3_close(writer_db_);
  writer_db_ = nullptr;
}

absl::Status SqliteLedger::RunSync(std::function<absl::Status(sqlite3*)> op,
                                   bool outside_transaction) {
  std::promise<absl::Status> result;
  auto future = result.get_future();
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (closing_) return absl::UnavailableError("ledger is closed");
    Work w;
    w.op = std::move(op);
    w.outside_transaction = outside_transaction;
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
    auto it = assigned_.find(session_id);
    if (it == assigned_.end()) it = assigned_.emplace(std::string(session_id), SessionHead{}).first;
    SessionHead head = it->second;
    first = head.sequence + 1;
    auto version = chain_versions_.find(session_id);
    const bool seal = version != chain_versions_.end() && version->second >= 2;
    std::vector<std::optional<PersonalPart>> personal(records.size());
    for (size_t k = 0; seal && k < records.size(); ++k) {
      auto part = SealPersonal(&records[k]);
      if (!part.ok()) return part.status();  // nothing handed out yet
      personal[k] = std::move(*part);
    }
    for (Record& r : records) {
      r.set_session_id(std::string(session_id));
      r.set_sequence(head.sequence + 1);
      auto hash = ChainHash(head.hash, r);
      if (!hash.ok()) return hash.status();  // nothing handed out yet
      r.set_hash(*hash);
      head = SessionHead{r.sequence(), *hash};
    }
    it->second = head;
    Work w;
    w.session_id = std::string(session_id);
    w.records = std::move(records);
    w.personal = std::move(personal);
    w.done = std::move(done);
    queue_.push_back(std::move(w));
    ops::SetLedgerQueueDepth(queue_.size());
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
  return WriteHealth();
}

absl::Status SqliteLedger::WriteHealth() {
  std::lock_guard<std::mutex> lock(mu_);
  return health_;
}

void SqliteLedger::SetHealth(absl::Status health) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (health_ == health) return;
    health_ = health;
  }
  if (options_.on_write_health) options_.on_write_health(health);
}

void SqliteLedger::WriterLoop() {
  while (true) {
    std::vector<Work> batch;
    bool failing = false;
    {
      std::unique_lock<std::mutex> lock(mu_);
      auto ready = [this] { return closing_ || !queue_.empty(); };
      // Woken early for a retry while failing, or when the side file is due.
      auto deadline = SteadyClock::time_point::max();
      if (!health_.ok()) deadline = next_retry_;
      if (heads_dirty_) deadline = std::min(deadline, heads_written_at_ + kHeadsInterval);
      if (deadline == SteadyClock::time_point::max()) {
        work_cv_.wait(lock, ready);
      } else {
        work_cv_.wait_until(lock, deadline, ready);
      }
      failing = !health_.ok();
      if (queue_.empty() && closing_) {
        lock.unlock();
        WriteHeadsIfDue(/*force=*/true);
        return;
      }
      size_t records = 0;
      while (!queue_.empty() && (batch.empty() || records < options_.max_batch_records)) {
        records += queue_.front().records.size();
        batch.push_back(std::move(queue_.front()));
        queue_.pop_front();
      }
      ops::SetLedgerQueueDepth(queue_.size());
    }
    // Retried on its schedule even while appends keep coming (they are
    // failed promptly below and must not starve the retry).
    if (failing && SteadyClock::now() >= next_retry_) TryRecover();
    // Consecutive record appends share one transaction; synchronous
    // operations run alone; barriers fire once what precedes them is done.
    size_t i = 0;
    while (i < batch.size()) {
      if (batch[i].op) {
        RunOp(batch[i++]);
        continue;
      }
      if (batch[i].barrier) {
        // What a barrier waits for includes the side file (Flush, then a
        // kill, must find it current).
        WriteHeadsIfDue(/*force=*/true);
        batch[i++].barrier();
        continue;
      }
      size_t end = i;
      while (end < batch.size() && !batch[end].op && !batch[end].barrier) ++end;
      CommitGroups(batch, i, end);
      i = end;
    }
    // Caught up: the side file, if due (else the wait above ends when it is).
    WriteHeadsIfDue(/*force=*/false);
  }
}

void SqliteLedger::RunOp(Work& w) {
  absl::Status s = WriteHealth();
  if (s.ok() && w.outside_transaction) {
    s = w.op(writer_db_);
    if (!s.ok() && IsStorageError(s)) {
      EnterFailing(s);
      s = WriteHealth();
    }
  } else if (s.ok()) {
    s = Exec(writer_db_, "BEGIN IMMEDIATE");
    if (s.ok()) s = w.op(writer_db_);
    if (s.ok()) {
      s = Exec(writer_db_, "COMMIT");
    }
    if (!s.ok()) {
      Exec(writer_db_, "ROLLBACK").IgnoreError();
      if (IsStorageError(s)) {
        EnterFailing(s);
        s = WriteHealth();
      }
    }
  }
  w.op_done(s);
}

void SqliteLedger::RechainLocked(const std::string& session, const SessionHead& head,
                                 std::vector<Work>& batch, size_t from) {
  SessionHead h = head;
  auto redo = [&](Work& w) {
    if (w.session_id != session || w.records.empty() || !w.error.ok()) return;
    SessionHead next = h;
    std::vector<std::string> hashes;
    for (Record& r : w.records) {
      r.set_sequence(next.sequence + 1);
      auto hash = ChainHash(next.hash, r);
      if (!hash.ok()) {
        w.error = hash.status();
        return;
      }
      next = SessionHead{r.sequence(), *hash};
      hashes.push_back(*hash);
    }
    for (size_t k = 0; k < w.records.size(); ++k) w.records[k].set_hash(hashes[k]);
    h = next;
  };
  for (size_t j = from; j < batch.size(); ++j) redo(batch[j]);
  for (Work& w : queue_) redo(w);
  assigned_[session] = h;
}

void SqliteLedger::CommitGroups(std::vector<Work>& batch, size_t begin, size_t end) {
  std::vector<absl::Status> results(end - begin);
  std::set<std::string> sessions;
  for (size_t j = begin; j < end; ++j) {
    if (!batch[j].records.empty()) sessions.insert(batch[j].session_id);
  }
  absl::Status fatal = WriteHealth();
  SessionHeads tx_heads;  // each session's head after its last group inserted here
  const SteadyClock::time_point began = SteadyClock::now();  // for the commit-latency metric
  size_t inserted_records = 0;
  if (fatal.ok()) fatal = ExecCached("BEGIN IMMEDIATE");
  for (size_t j = begin; fatal.ok() && j < end; ++j) {
    Work& w = batch[j];
    if (w.records.empty()) continue;
    absl::Status s = w.error;
    bool inserted = false;
    if (s.ok()) {
      if (fatal = ExecCached("SAVEPOINT append_group"); !fatal.ok()) break;
      for (size_t k = 0; k < w.records.size(); ++k) {
        const PersonalPart* part =
            k < w.personal.size() && w.personal[k] ? &*w.personal[k] : nullptr;
        if (s = tables_->Insert(w.records[k], part); !s.ok()) break;
      }
      if (s.ok()) {
        fatal = ExecCached("RELEASE append_group");
        inserted = fatal.ok();
      } else if (IsStorageError(s)) {
        fatal = s;
      } else {
        // Only this group is undone; the others in the transaction stay.
        fatal = Exec(writer_db_, "ROLLBACK TO append_group");
        if (fatal.ok()) fatal = Exec(writer_db_, "RELEASE append_group");
      }
    }
    if (!fatal.ok()) break;
    if (inserted) {
      inserted_records += w.records.size();
      tx_heads[w.session_id] = SessionHead{w.records.back().sequence(), w.records.back().hash()};
      continue;
    }
    results[j - begin] = absl::Status(
        s.code(), Cat("record not stored (session ", w.session_id, "): ", s.message()));
    TM_LOG(kWarning) << results[j - begin].message();
    // Its sequences go to the session's next appends: no hole in the chain.
    std::lock_guard<std::mutex> lock(mu_);
    auto t = tx_heads.find(w.session_id);
    RechainLocked(w.session_id, t != tx_heads.end() ? t->second : committed_[w.session_id], batch,
                  j + 1);
  }
  if (fatal.ok()) fatal = ExecCached("COMMIT");
  if (!fatal.ok()) {
    if (!sqlite3_get_autocommit(writer_db_)) Exec(writer_db_, "ROLLBACK").IgnoreError();
    absl::Status health = WriteHealth();
    if (health.ok()) {
      EnterFailing(fatal);
      health = WriteHealth();
    }
    if (health.ok()) health = fatal;  // not a storage error: still nothing committed
    for (absl::Status& r : results) {
      if (r.ok()) r = health;
    }
    std::lock_guard<std::mutex> lock(mu_);
    for (const std::string& session : sessions) {
      RechainLocked(session, committed_[session], batch, end);
    }
  } else {
    ops::ObserveLedgerCommit(
        std::chrono::duration_cast<std::chrono::nanoseconds>(SteadyClock::now() - began).count(),
        inserted_records);
    {
      std::lock_guard<std::mutex> lock(mu_);
      for (auto& [session, head] : tx_heads) committed_[session] = head;
    }
    // The side file is rewritten by WriteHeadsIfDue: after this batch under
    // synchronous=FULL, else at most every kHeadsInterval (and before a
    // flush completes). Either way after COMMIT, so it lags the ledger but
    // never leads it.
    if (!tx_heads.empty()) heads_dirty_ = true;
    WriteHeadsIfDue(/*force=*/false);
  }
  for (size_t j = begin; j < end; ++j) {
    if (batch[j].done) batch[j].done(results[j - begin], batch[j].records);
  }
}

absl::Status SqliteLedger::ExecCached(const char* sql) {
  // sqlite3_exec parses its SQL every time: per appended group that was the
  // SAVEPOINT and RELEASE text, parsed on the writer thread for each feedback.
  auto it = cached_.find(sql);
  if (it == cached_.end()) {
    it = cached_.emplace(sql, std::make_unique<Statement>(writer_db_, sql)).first;
  }
  Statement& st = *it->second;
  if (!st.status().ok()) return Exec(writer_db_, sql);
  absl::Status s = st.Reset().Run();
  // The same status as Exec would give (storage errors are told apart by it).
  if (!s.ok()) s = SqlError(writer_db_, Cat("sqlite ", std::string_view(sql).substr(0, 40)));
  st.Reset();  // nothing stays pending on the connection (ROLLBACK follows a failure)
  return s;
}

void SqliteLedger::WriteHeadsIfDue(bool force) {
  if (!heads_dirty_) return;
  const auto now = SteadyClock::now();
  // Rewriting the file (create, write, close, rename) cost as much as the
  // commit itself in WAL mode with synchronous=NORMAL; per batch it is kept
  // only where the WAL is fsynced too (FULL). Otherwise at most every
  // kHeadsInterval: a writer that catches up after nearly every batch (many
  // clients sending a little each) rewrote it per batch, 5% of the server's
  // CPU at 1000 connections (connections_bench, perf).
  if (!force && !options_.synchronous_full && now - heads_written_at_ < kHeadsInterval) return;
  SessionHeads snapshot;
  {
    std::lock_guard<std::mutex> lock(mu_);
    snapshot = committed_;
  }
  heads_dirty_ = false;
  heads_written_at_ = now;
  if (absl::Status s = heads_file_.Write(snapshot); !s.ok()) {
    TM_LOG(kWarning) << "ledger side file not updated: " << s.message();
  }
}

void SqliteLedger::EnterFailing(const absl::Status& cause) {
  const bool full = absl::IsResourceExhausted(cause);
  absl::Status health =
      full ? absl::ResourceExhaustedError(Cat("ledger disk full: ", cause.message()))
           : absl::UnavailableError(Cat("ledger write failed: ", cause.message()));
  // A checkpoint copies WAL pages into the main file and would spend the
  // space the reserve frees; the WAL holds every committed record safely
  // until writes work again.
  checkpointer_->Pause(true);
  sqlite3_db_config(writer_db_, SQLITE_DBCONFIG_NO_CKPT_ON_CLOSE, 1, nullptr);
  reads_->SetCheckpointOnClose(false);
  if (full) reserve_.Release();
  absl::Status noted = NoteLedgerEvent("write_failing", std::string(health.message()));
  TM_LOG(kError) << health.message() << "; appends fail with this error until a retry succeeds ("
                 << (noted.ok() ? "noted in ledger_event"
                                : Cat("could not note it in ledger_event: ", noted.message()))
                 << ")";
  failing_since_ = SteadyClock::now();
  backoff_ = options_.retry_initial;
  next_retry_ = failing_since_ + backoff_;
  SetHealth(health);
}

void SqliteLedger::TryRecover() {
  const absl::Status health = WriteHealth();
  auto again = [this](const absl::Status& why) {
    backoff_ = std::min(backoff_ * 2, options_.retry_max);
    next_retry_ = SteadyClock::now() + backoff_;
    TM_LOG(kDebug) << "ledger still failing (" << why.message() << "); next try in "
                   << backoff_.count() << " ms";
  };
  if (absl::Status s = reserve_.Create(); !s.ok()) return again(s);
  if (absl::IsResourceExhausted(health) && reserve_.bytes() > 0 &&
      FreeBytes(options_.path) < reserve_.bytes()) {
    // Room for the reserve alone is the room it freed: resuming would only
    // fill the disk again at once.
    return again(absl::ResourceExhaustedError("no room beyond the reserve file"));
  }
  const auto failed_for =
      std::chrono::duration_cast<std::chrono::milliseconds>(SteadyClock::now() - failing_since_);
  if (absl::Status s = NoteLedgerEvent(
          "write_resumed", Cat("after ", failed_for.count(), " ms of: ", health.message()));
      !s.ok()) {
    return again(s);
  }
  checkpointer_->Pause(false);
  sqlite3_db_config(writer_db_, SQLITE_DBCONFIG_NO_CKPT_ON_CLOSE, 0, nullptr);
  reads_->SetCheckpointOnClose(true);
  TM_LOG(kInfo) << "ledger writes resumed after " << failed_for.count()
                << " ms (were failing: " << health.message() << ")";
  backoff_ = std::chrono::milliseconds(0);
  SetHealth(absl::OkStatus());
}

absl::Status SqliteLedger::CreateSession(const SessionRow& row) {
  absl::Status s = RunSync([&row](sqlite3* db) {
    Statement q(
        db,
        "INSERT INTO session (id, title, study, state, opened_session_ns, utc_anchor_ns, "
        "mono_anchor_ns, boot_id, pin_kernels, kind, condition, participants, chain_version) "
        "VALUES (?, ?, ?, 'open', ?, ?, ?, ?, ?, ?, ?, ?, ?)");
    auto participants = JsonStringArray(db, row.participants);
    if (!participants.ok()) return participants.status();
    return q.Bind(row.id)
        .Bind(row.title)
        .Bind(row.study)
        .Bind(row.opened_session_ns)
        .Bind(row.utc_anchor_ns)
        .Bind(row.mono_anchor_ns)
        .Bind(row.boot_id)
        .Bind(row.pin_kernels)
        .Bind(row.kind)
        .Bind(row.condition)
        .Bind(*participants)
        .Bind(static_cast<int64_t>(row.chain_version))
        .Run();
  });
  if (s.ok()) {
    std::lock_guard<std::mutex> lock(mu_);
    chain_versions_[row.id] = row.chain_version;
  }
  return s;
}

absl::StatusOr<SessionRow> SqliteLedger::GetSession(std::string_view id) {
  return reads_->GetSession(id);
}

absl::StatusOr<std::vector<SessionRow>> SqliteLedger::ListSessions(bool include_closed) {
  return reads_->ListSessions(include_closed);
}

absl::StatusOr<SessionRow> SqliteLedger::GetStudy(std::string_view id) {
  return reads_->GetStudy(id);
}

absl::StatusOr<std::vector<SessionRow>> SqliteLedger::ListStudies() {
  return reads_->ListStudies();
}

absl::Status SqliteLedger::CloseSession(std::string_view id, int64_t closed_session_ns) {
  return RunSync([id, closed_session_ns](sqlite3* db) -> absl::Status {
    Statement q(db, "UPDATE session SET state = 'closed', closed_session_ns = ? WHERE id = ?");
    if (absl::Status s = q.Bind(closed_session_ns).Bind(id).Run(); !s.ok()) return s;
    if (sqlite3_changes(db) == 0) return absl::NotFoundError(Cat("no session '", id, "'"));
    return absl::OkStatus();
  });
}

absl::Status SqliteLedger::ReanchorSession(std::string_view id, int64_t utc_anchor_ns,
                                           int64_t mono_anchor_ns, std::string_view boot_id) {
  return RunSync([=](sqlite3* db) {
    Statement q(
        db, "UPDATE session SET utc_anchor_ns = ?, mono_anchor_ns = ?, boot_id = ? WHERE id = ?");
    return q.Bind(utc_anchor_ns).Bind(mono_anchor_ns).Bind(boot_id).Bind(id).Run();
  });
}

absl::Status SqliteLedger::PutToken(const TokenRow& row) {
  return RunSync([&row](sqlite3* db) {
    Statement q(db,
                "INSERT INTO token (id, session_id, role, subject, secret_sha256, "
                "issued_session_ns, revoked) VALUES (?, ?, ?, ?, ?, ?, ?)");
    if (row.session_id.empty()) {
      q.Bind(row.id).BindNull();
    } else {
      q.Bind(row.id).Bind(row.session_id);
    }
    return q.Bind(RoleWord(row.role))
        .Bind(row.subject)
        .BindBlob(row.hash)
        .Bind(row.issued_session_ns)
        .Bind(row.revoked)
        .Run();
  });
}

absl::StatusOr<TokenRow> SqliteLedger::FindTokenByHash(std::string_view hash) {
  return reads_->FindTokenByHash(hash);
}

absl::StatusOr<std::vector<TokenRow>> SqliteLedger::ListTokens(std::string_view session_id) {
  return reads_->ListTokens(session_id);
}

absl::StatusOr<TokenRow> SqliteLedger::RevokeToken(std::string_view session_id,
                                                   std::string_view token_id) {
  absl::Status s = RunSync([=](sqlite3* db) -> absl::Status {
    Statement q(db, "UPDATE token SET revoked = 1 WHERE id = ? AND session_id = ?");
    if (absl::Status st = q.Bind(token_id).Bind(session_id).Run(); !st.ok()) return st;
    if (sqlite3_changes(db) == 0) {
      return absl::NotFoundError(Cat("no token '", token_id, "' in session '", session_id, "'"));
    }
    return absl::OkStatus();
  });
  if (!s.ok()) return s;
  return reads_->FindToken(token_id);
}

absl::StatusOr<std::vector<Record>> SqliteLedger::Read(std::string_view session_id, uint64_t from,
                                                       size_t max) {
  return reads_->Read(session_id, from, max);
}

absl::StatusOr<std::optional<uint64_t>> SqliteLedger::FindClientSequence(
    std::string_view session_id, std::string_view client_id, uint64_t client_sequence) {
  return reads_->FindClientSequence(session_id, client_id, client_sequence);
}

absl::StatusOr<uint64_t> SqliteLedger::LastClientSequence(std::string_view session_id,
                                                          std::string_view client_id) {
  return reads_->LastClientSequence(session_id, client_id);
}

absl::StatusOr<RecordCounts> SqliteLedger::Counts(std::string_view session_id) {
  return reads_->Counts(session_id);
}

absl::StatusOr<std::vector<tickmark::v1::Record>> SqliteLedger::ReadCalibrationEvents(
    std::string_view session_id, std::string_view client_id, std::string_view run) {
  return reads_->ReadCalibrationEvents(session_id, client_id, run);
}

absl::StatusOr<std::vector<CalibrationRow>> SqliteLedger::ListCalibrations(
    std::string_view trainer) {
  return reads_->ListCalibrations(trainer);
}

absl::StatusOr<tickmark::v1::Record> SqliteLedger::GetCalibration(std::string_view id) {
  return reads_->GetCalibration(id);
}

absl::StatusOr<std::optional<tickmark::v1::Record>> SqliteLedger::LatestCalibration(
    std::string_view trainer) {
  return reads_->LatestCalibration(trainer);
}

absl::Status SqliteLedger::PutDerivedSet(std::string_view session_id, std::string_view name,
                                         std::string_view spec, const std::vector<Record>& records,
                                         bool overwrite) {
  return RunSync([&, this](sqlite3* db) -> absl::Status {
    {
      Statement q(db, "SELECT COUNT(*) FROM derived_set WHERE session_id = ? AND name = ?");
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
      Statement d(db, sql);
      if (absl::Status st = d.Bind(session_id).Bind(name).Run(); !st.ok()) return st;
    }
    Statement ins(db, "INSERT INTO derived_set (session_id, name, spec) VALUES (?, ?, ?)");
    if (absl::Status st = ins.Bind(session_id).Bind(name).Bind(spec).Run(); !st.ok()) return st;
    uint64_t seq = 0;
    for (const Record& r : records) {
      Record copy = r;
      copy.set_session_id(std::string(session_id));
      if (absl::Status st = tables_->InsertDerived(name, ++seq, copy); !st.ok()) return st;
    }
    return absl::OkStatus();
  });
}

absl::Status SqliteLedger::PutTimeSet(const TimeSetRow& set,
                                      const std::vector<DerivedTimeRow>& times) {
  return RunSync([&](sqlite3* db) -> absl::Status {
    {
      Statement q(db, "SELECT COUNT(*) FROM time_set WHERE id = ?");
      auto row = q.Bind(set.id).Step();
      if (!row.ok()) return row.status();
      if (q.Int(0) > 0) return absl::AlreadyExistsError(Cat("time set '", set.id, "' exists"));
    }
    Statement ins(db,
                  "INSERT INTO time_set (id, session_id, method, parameters, through_seq, "
                  "head_hash, events, retimed) VALUES (?, ?, ?, ?, ?, ?, ?, ?)");
    absl::Status st = ins.Bind(set.id)
                          .Bind(set.session_id)
                          .Bind(set.method)
                          .Bind(set.parameters)
                          .Bind(set.through_sequence)
                          .BindBlob(set.head_hash)
                          .Bind(set.events)
                          .Bind(set.retimed)
                          .Run();
    if (!st.ok()) return st;
    Statement row(db,
                  "INSERT INTO derived_time (time_set, session_id, seq, kind, client_id, "
                  "event_session_ns, uncertainty_ns, live_session_ns, live_uncertainty_ns, "
                  "outcome, probes) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)");
    for (const DerivedTimeRow& t : times) {
      st = row.Reset()
               .Bind(set.id)
               .Bind(set.session_id)
               .Bind(t.sequence)
               .Bind(t.kind)
               .Bind(t.client_id)
               .Bind(t.event_session_ns)
               .Bind(t.uncertainty_ns)
               .Bind(t.live_session_ns)
               .Bind(t.live_uncertainty_ns)
               .Bind(t.outcome)
               .Bind(static_cast<int64_t>(t.probes))
               .Run();
      if (!st.ok()) return st;
    }
    return absl::OkStatus();
  });
}

absl::StatusOr<std::vector<TimeSetRow>> SqliteLedger::ListTimeSets(std::string_view session_id) {
  return reads_->ListTimeSets(session_id);
}

absl::StatusOr<TimeSetRow> SqliteLedger::GetTimeSet(std::string_view id) {
  return reads_->GetTimeSet(id);
}

absl::StatusOr<std::vector<DerivedTimeRow>> SqliteLedger::ReadDerivedTimes(
    std::string_view time_set) {
  return reads_->ReadDerivedTimes(time_set);
}

absl::Status SqliteLedger::PutReceipt(const tickmark::v1::Receipt& receipt,
                                      std::string_view public_key_pem) {
  return RunSync([&](sqlite3* db) {
    Statement q(db,
                "INSERT OR REPLACE INTO receipt (session_id, last_seq, head_hash, chain_version, "
                "signed_utc, message, signature, public_key_sha256, public_key_pem) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)");
    return q.Bind(receipt.session_id())
        .Bind(receipt.last_sequence())
        .BindBlob(receipt.head_hash())
        .Bind(static_cast<int64_t>(receipt.chain_version()))
        .Bind(receipt.signed_utc())
        .BindBlob(receipt.message())
        .BindBlob(receipt.signature())
        .BindBlob(receipt.public_key_sha256())
        .Bind(public_key_pem)
        .Run();
  });
}

absl::StatusOr<std::optional<tickmark::v1::Receipt>> SqliteLedger::GetReceipt(
    std::string_view session_id) {
  return reads_->GetReceipt(session_id);
}

absl::StatusOr<std::vector<PersonalHolding>> SqliteLedger::FindPersonalContent(
    std::string_view participant) {
  return reads_->FindPersonalContent(participant);
}

absl::Status SqliteLedger::ErasePersonalContent(std::string_view participant,
                                                const std::vector<std::string>& session_ids) {
  absl::Status s = RunSync([&](sqlite3* db) -> absl::Status {
    for (const std::string& sid : session_ids) {
      for (const char* sql :
           {"UPDATE feedback SET value = 0, input = '', erased = 1 WHERE session_id = ?1 AND "
            "seq IN (SELECT seq FROM personal WHERE session_id = ?1 AND participant = ?2)",
            "UPDATE calibration_event SET approve = 0, detail = '', erased = 1 WHERE "
            "session_id = ?1 AND seq IN (SELECT seq FROM personal WHERE session_id = ?1 AND "
            "participant = ?2)",
            "DELETE FROM personal WHERE session_id = ?1 AND participant = ?2"}) {
        Statement q(db, sql);
        if (absl::Status st = q.Bind(sid).Bind(participant).Run(); !st.ok()) return st;
      }
    }
    return absl::OkStatus();
  });
  if (!s.ok()) return s;
  // No copy left in the file: secure_delete zeroed the deleted cells; VACUUM
  // rebuilds the file without free pages; the checkpoint moves the rebuilt
  // pages into the main file and truncates the WAL, which still held the
  // old pages (SQLite docs: VACUUM, PRAGMA wal_checkpoint(TRUNCATE)).
  return RunSync(
      [](sqlite3* db) -> absl::Status {
        if (absl::Status st = Exec(db, "VACUUM"); !st.ok()) return st;
        int log = 0, done = 0;
        if (sqlite3_wal_checkpoint_v2(db, nullptr, SQLITE_CHECKPOINT_TRUNCATE, &log, &done) !=
            SQLITE_OK) {
          return SqlError(db, "WAL checkpoint after erasure");
        }
        return absl::OkStatus();
      },
      /*outside_transaction=*/true);
}

uint64_t SqliteLedger::CommittedSequence(std::string_view session_id) {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = committed_.find(session_id);
  return it == committed_.end() ? 0 : it->second.sequence;
}

}  // namespace tickmark::ledger

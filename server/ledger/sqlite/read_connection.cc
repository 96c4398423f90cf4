#include "server/ledger/sqlite/read_connection.h"

#include <sqlite3.h>

#include "absl/strings/str_split.h"
#include "server/base/strings.h"
#include "server/ledger/sqlite/enum_names.h"
#include "server/ledger/sqlite/statement.h"

namespace tickmark::ledger {
namespace {

using tickmark::v1::Record;

SessionRow SessionFromRow(const Statement& q) {
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
  row.pin_kernels = q.Int(10) != 0;
  row.kind = q.Text(11);
  row.condition = q.Text(12);
  // participants: the JSON array's elements, joined by the unit separator
  // (kSessionColumns unpacks it with json_each).
  row.participants = absl::StrSplit(q.Text(13), '\x1f', absl::SkipEmpty());
  row.chain_version = static_cast<uint32_t>(q.Int(14));
  return row;
}

constexpr const char* kSessionColumns =
    "id, title, study, state, opened_session_ns, closed_session_ns, utc_anchor_ns, "
    "mono_anchor_ns, boot_id, (SELECT COALESCE(MAX(seq), 0) FROM record r WHERE r.session_id = "
    "session.id), pin_kernels, kind, condition, "
    "(SELECT group_concat(value, char(31)) FROM "
    "(SELECT value FROM json_each(session.participants) ORDER BY key)), chain_version";

TokenRow TokenFromRow(const Statement& q) {
  TokenRow t;
  t.id = q.Text(0);
  t.session_id = q.Text(1);
  t.role = RoleFromWord(q.Text(2));
  t.subject = q.Text(3);
  t.hash = q.Blob(4);
  t.issued_session_ns = q.Int(5);
  t.revoked = q.Int(6) != 0;
  return t;
}

// A record's body and hash from the current row (columns `body_col`, +1),
// and its personal content (chain version 2) from column `body_col` + 2 when
// `with_personal` (NULL: none kept, or erased).
absl::StatusOr<Record> RecordFromRow(const Statement& q, int body_col, std::string_view session_id,
                                     bool with_personal = false) {
  Record r;
  if (!r.ParseFromString(q.Blob(body_col))) {
    return absl::DataLossError(Cat("record body does not parse in session ", session_id));
  }
  r.set_hash(q.Blob(body_col + 1));
  if (with_personal && !q.IsNull(body_col + 2)) {
    if (absl::Status s = RestorePersonal(&r, q.Blob(body_col + 2)); !s.ok()) return s;
  }
  return r;
}

// Joins a record (alias r) to its personal content (alias p).
constexpr const char* kPersonalJoin =
    " LEFT JOIN personal p ON p.session_id = r.session_id AND p.seq = r.seq ";

CalibrationRow CalibrationFromRow(const Statement& q) {
  CalibrationRow c;
  c.id = q.Text(0);
  c.trainer = q.Text(1);
  c.session_id = q.Text(2);
  c.sequence = static_cast<uint64_t>(q.Int(3));
  c.created_session_ns = q.Int(4);
  c.family = q.Text(5);
  c.kernel_description = q.Text(6);
  c.valid = static_cast<uint32_t>(q.Int(7));
  c.warning = q.Int(8) != 0;
  c.source_kind = SourceKindFromWord(q.Text(9));
  return c;
}

TimeSetRow TimeSetFromRow(const Statement& q) {
  TimeSetRow t;
  t.id = q.Text(0);
  t.session_id = q.Text(1);
  t.created_utc = q.Text(2);
  t.method = q.Text(3);
  t.parameters = q.Text(4);
  t.through_sequence = static_cast<uint64_t>(q.Int(5));
  t.head_hash = q.Blob(6);
  t.events = static_cast<uint64_t>(q.Int(7));
  t.retimed = static_cast<uint64_t>(q.Int(8));
  return t;
}

constexpr const char* kTimeSetColumns =
    "id, session_id, created_utc, method, parameters, through_seq, head_hash, events, retimed";

constexpr const char* kTokenColumns =
    "id, COALESCE(session_id, ''), role, subject, secret_sha256, issued_session_ns, revoked";

}  // namespace

ReadConnection::ReadConnection(sqlite3* db) : db_(db) {}

ReadConnection::~ReadConnection() { Close(); }

void ReadConnection::Close() {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ != nullptr) sqlite3_close(db_);
  db_ = nullptr;
}

void ReadConnection::SetCheckpointOnClose(bool on) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ != nullptr) sqlite3_db_config(db_, SQLITE_DBCONFIG_NO_CKPT_ON_CLOSE, on ? 0 : 1, nullptr);
}

// A row of `session` of one kind ("session" or "study"), by id.
absl::StatusOr<SessionRow> ReadConnection::GetSessionRow(std::string_view id,
                                                         std::string_view kind) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_,
              Cat("SELECT ", kSessionColumns, " FROM session WHERE id = ? AND kind = ?").c_str());
  auto row = q.Bind(id).Bind(kind).Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError(Cat("no ", kind, " '", id, "'"));
  return SessionFromRow(q);
}

// The rows of `session` a WHERE clause selects, oldest first.
absl::StatusOr<std::vector<SessionRow>> ReadConnection::ListSessionRows(std::string_view where) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_, Cat("SELECT ", kSessionColumns, " FROM session WHERE ", where,
                       " ORDER BY opened_session_ns, id")
                       .c_str());
  std::vector<SessionRow> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    out.push_back(SessionFromRow(q));
  }
  return out;
}

absl::StatusOr<SessionRow> ReadConnection::GetSession(std::string_view id) {
  return GetSessionRow(id, "session");
}

absl::StatusOr<SessionRow> ReadConnection::GetStudy(std::string_view id) {
  return GetSessionRow(id, "study");
}

absl::StatusOr<std::vector<SessionRow>> ReadConnection::ListStudies() {
  return ListSessionRows("kind = 'study'");
}

absl::StatusOr<std::vector<SessionRow>> ReadConnection::ListSessions(bool include_closed) {
  return ListSessionRows(include_closed ? "kind = 'session'"
                                        : "kind = 'session' AND state = 'open'");
}

absl::StatusOr<TokenRow> ReadConnection::FindTokenByHash(std::string_view hash) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_, Cat("SELECT ", kTokenColumns, " FROM token WHERE secret_sha256 = ?").c_str());
  auto row = q.BindBlob(hash).Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError("unknown token");
  return TokenFromRow(q);
}

absl::StatusOr<std::vector<TokenRow>> ReadConnection::ListTokens(std::string_view session_id) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_, Cat("SELECT ", kTokenColumns,
                       " FROM token WHERE session_id = ? ORDER BY issued_session_ns, id")
                       .c_str());
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

absl::StatusOr<std::vector<Record>> ReadConnection::Read(std::string_view session_id, uint64_t from,
                                                         size_t max) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_, Cat("SELECT r.body, r.hash, p.content FROM record r", kPersonalJoin,
                       "WHERE r.session_id = ? AND r.seq >= ? ORDER BY r.seq LIMIT ?")
                       .c_str());
  q.Bind(session_id).Bind(from).Bind(static_cast<int64_t>(max));
  std::vector<Record> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    auto r = RecordFromRow(q, 0, session_id, /*with_personal=*/true);
    if (!r.ok()) return r.status();
    out.push_back(*std::move(r));
  }
  return out;
}

absl::StatusOr<std::optional<uint64_t>> ReadConnection::FindClientSequence(
    std::string_view session_id, std::string_view client_id, uint64_t client_sequence) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_,
              "SELECT seq FROM record WHERE session_id = ? AND client_id = ? AND client_seq = ?");
  auto row = q.Bind(session_id).Bind(client_id).Bind(client_sequence).Step();
  if (!row.ok()) return row.status();
  if (!*row) return std::optional<uint64_t>();
  return std::optional<uint64_t>(static_cast<uint64_t>(q.Int(0)));
}

absl::StatusOr<uint64_t> ReadConnection::LastClientSequence(std::string_view session_id,
                                                            std::string_view client_id) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_,
              "SELECT COALESCE(MAX(client_seq), 0) FROM record WHERE session_id = ? AND "
              "client_id = ? AND client_seq IS NOT NULL");
  auto row = q.Bind(session_id).Bind(client_id).Step();
  if (!row.ok()) return row.status();
  return static_cast<uint64_t>(q.Int(0));
}

absl::StatusOr<RecordCounts> ReadConnection::Counts(std::string_view session_id) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_,
              "SELECT (SELECT COUNT(*) FROM feedback WHERE session_id = ?1),"
              " (SELECT COUNT(*) FROM step WHERE session_id = ?1),"
              " (SELECT COUNT(*) FROM probe WHERE session_id = ?1),"
              " (SELECT COUNT(*) FROM marker WHERE session_id = ?1),"
              " (SELECT COUNT(*) FROM client WHERE session_id = ?1),"
              " (SELECT COUNT(*) FROM feedback WHERE session_id = ?1 AND late)"
              "  + (SELECT COUNT(*) FROM step WHERE session_id = ?1 AND late),"
              " (SELECT COUNT(*) FROM unmatched WHERE session_id = ?1 AND derived_set = 'live'),"
              " (SELECT COUNT(*) FROM probe WHERE session_id = ?1 AND NOT accepted),"
              " (SELECT COUNT(*) FROM sync_pulse WHERE session_id = ?1)");
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
  c.sync_pulses = static_cast<uint64_t>(q.Int(8));
  return c;
}

absl::StatusOr<std::vector<Record>> ReadConnection::ReadCalibrationEvents(
    std::string_view session_id, std::string_view client_id, std::string_view run) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_, Cat("SELECT r.body, r.hash, p.content FROM calibration_event e JOIN record r "
                       "ON r.session_id = e.session_id AND r.seq = e.seq",
                       kPersonalJoin,
                       "WHERE e.session_id = ? AND e.client_id = ? AND e.run = ? ORDER BY e.seq")
                       .c_str());
  q.Bind(session_id).Bind(client_id).Bind(run);
  std::vector<Record> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    auto r = RecordFromRow(q, 0, session_id, /*with_personal=*/true);
    if (!r.ok()) return r.status();
    out.push_back(*std::move(r));
  }
  return out;
}

absl::StatusOr<std::vector<CalibrationRow>> ReadConnection::ListCalibrations(
    std::string_view trainer) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_,
              "SELECT id, trainer, session_id, seq, created_session_ns, family, "
              "kernel_description, valid, warning, source_kind FROM calibration WHERE ?1 = '' OR "
              "trainer = ?1 ORDER BY created_session_ns DESC, id DESC");
  q.Bind(trainer);
  std::vector<CalibrationRow> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    out.push_back(CalibrationFromRow(q));
  }
  return out;
}

absl::StatusOr<Record> ReadConnection::GetCalibration(std::string_view id) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_,
              "SELECT r.body, r.hash, c.session_id FROM calibration c JOIN record r ON "
              "r.session_id = c.session_id AND r.seq = c.seq WHERE c.id = ?");
  auto row = q.Bind(id).Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError(Cat("no calibration '", id, "'"));
  return RecordFromRow(q, 0, q.Text(2));
}

absl::StatusOr<std::optional<Record>> ReadConnection::LatestCalibration(std::string_view trainer) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_,
              "SELECT r.body, r.hash, c.session_id FROM calibration c JOIN record r ON "
              "r.session_id = c.session_id AND r.seq = c.seq WHERE c.trainer = ? ORDER BY "
              "c.created_session_ns DESC, c.id DESC LIMIT 1");
  auto row = q.Bind(trainer).Step();
  if (!row.ok()) return row.status();
  if (!*row) return std::optional<Record>();
  auto r = RecordFromRow(q, 0, q.Text(2));
  if (!r.ok()) return r.status();
  return std::optional<Record>(*std::move(r));
}

absl::StatusOr<TokenRow> ReadConnection::FindToken(std::string_view token_id) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_, Cat("SELECT ", kTokenColumns, " FROM token WHERE id = ?").c_str());
  auto row = q.Bind(token_id).Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError("token vanished");
  return TokenFromRow(q);
}

absl::StatusOr<std::vector<TimeSetRow>> ReadConnection::ListTimeSets(std::string_view session_id) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  // Newest first: rows are never updated, so insertion order is creation order.
  Statement q(db_, Cat("SELECT ", kTimeSetColumns,
                       " FROM time_set WHERE session_id = ? ORDER BY rowid DESC")
                       .c_str());
  q.Bind(session_id);
  std::vector<TimeSetRow> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    out.push_back(TimeSetFromRow(q));
  }
  return out;
}

absl::StatusOr<TimeSetRow> ReadConnection::GetTimeSet(std::string_view id) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_, Cat("SELECT ", kTimeSetColumns, " FROM time_set WHERE id = ?").c_str());
  auto row = q.Bind(id).Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError(Cat("no time set '", id, "'"));
  return TimeSetFromRow(q);
}

absl::StatusOr<std::vector<DerivedTimeRow>> ReadConnection::ReadDerivedTimes(
    std::string_view time_set) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_,
              "SELECT seq, kind, client_id, event_session_ns, uncertainty_ns, live_session_ns, "
              "live_uncertainty_ns, outcome, probes FROM derived_time WHERE time_set = ? "
              "ORDER BY seq, kind");
  q.Bind(time_set);
  std::vector<DerivedTimeRow> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    DerivedTimeRow t;
    t.sequence = static_cast<uint64_t>(q.Int(0));
    t.kind = q.Text(1);
    t.client_id = q.Text(2);
    t.event_session_ns = q.Int(3);
    t.uncertainty_ns = q.Int(4);
    t.live_session_ns = q.Int(5);
    t.live_uncertainty_ns = q.Int(6);
    t.outcome = q.Text(7);
    t.probes = static_cast<uint32_t>(q.Int(8));
    out.push_back(std::move(t));
  }
  return out;
}

absl::StatusOr<std::optional<tickmark::v1::Receipt>> ReadConnection::GetReceipt(
    std::string_view session_id) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  Statement q(db_,
              "SELECT session_id, last_seq, head_hash, chain_version, signed_utc, message, "
              "signature, public_key_sha256 FROM receipt WHERE session_id = ?");
  auto row = q.Bind(session_id).Step();
  if (!row.ok()) return row.status();
  if (!*row) return std::optional<tickmark::v1::Receipt>();
  tickmark::v1::Receipt r;
  r.set_session_id(q.Text(0));
  r.set_last_sequence(static_cast<uint64_t>(q.Int(1)));
  r.set_head_hash(q.Blob(2));
  r.set_chain_version(static_cast<uint32_t>(q.Int(3)));
  r.set_signed_utc(q.Text(4));
  r.set_message(q.Blob(5));
  r.set_signature(q.Blob(6));
  r.set_public_key_sha256(q.Blob(7));
  return std::optional<tickmark::v1::Receipt>(std::move(r));
}

absl::StatusOr<std::vector<PersonalHolding>> ReadConnection::FindPersonalContent(
    std::string_view participant) {
  std::lock_guard<std::mutex> lock(mu_);
  if (db_ == nullptr) return absl::UnavailableError("ledger is closed");
  // Version 2: the kept personal rows. Version 1: any feedback or answer of
  // the trainer (hashed whole, so it cannot be erased).
  Statement q(db_,
              "SELECT s.id, s.state = 'open', s.chain_version, p.seq FROM personal p JOIN "
              "session s ON s.id = p.session_id WHERE p.participant = ?1 "
              "UNION ALL SELECT DISTINCT s.id, s.state = 'open', s.chain_version, NULL FROM "
              "session s WHERE s.chain_version < 2 AND (EXISTS (SELECT 1 FROM feedback f WHERE "
              "f.session_id = s.id AND f.trainer = ?1) OR EXISTS (SELECT 1 FROM "
              "calibration_event e WHERE e.session_id = s.id AND e.trainer = ?1)) "
              "ORDER BY 1, 4");
  q.Bind(participant);
  std::vector<PersonalHolding> out;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    if (out.empty() || out.back().session_id != q.Text(0)) {
      PersonalHolding h;
      h.session_id = q.Text(0);
      h.open = q.Int(1) != 0;
      h.chain_version = static_cast<uint32_t>(q.Int(2));
      out.push_back(std::move(h));
    }
    if (!q.IsNull(3)) out.back().sequences.push_back(static_cast<uint64_t>(q.Int(3)));
  }
  return out;
}

}  // namespace tickmark::ledger

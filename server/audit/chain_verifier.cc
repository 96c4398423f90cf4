#include "server/audit/chain_verifier.h"

#include <filesystem>
#include <fstream>
#include <map>
#include <memory>
#include <set>
#include <sstream>

#include "absl/strings/escaping.h"
#include "server/audit/receipt.h"
#include "server/audit/sqlite_file.h"
#include "server/base/sha256.h"

namespace tickmark::audit {
namespace {

using tickmark::v1::Record;

absl::StatusOr<Db> OpenReadOnly(const std::string& path) {
  std::error_code ec;
  if (!std::filesystem::is_regular_file(path, ec)) {
    return absl::NotFoundError(Cat("no ledger file ", path));
  }
  sqlite3* raw = nullptr;
  int rc = sqlite3_open_v2(path.c_str(), &raw, SQLITE_OPEN_READONLY, nullptr);
  Db db(raw);
  if (rc != SQLITE_OK) {
    return absl::InvalidArgumentError(
        Cat("cannot open ", path, ": ", raw ? sqlite3_errmsg(raw) : "no memory"));
  }
  sqlite3_busy_timeout(raw, 5000);
  if (!HasColumn(raw, "record", "body") || !HasColumn(raw, "session", "id")) {
    return absl::InvalidArgumentError(Cat(path, " is not a tickmark ledger (no record table)"));
  }
  return db;
}

// SHA-256 of a then b; empty (never equal to a stored hash) if OpenSSL fails.
std::string Sha256Of(std::string_view a, std::string_view b) {
  auto digest = Sha256(a, b);
  return digest.ok() ? *digest : std::string();
}

std::string_view DigestOf(const Record& r) {
  if (r.has_feedback()) return r.feedback().personal_digest();
  if (r.has_calibration_event()) return r.calibration_event().personal_digest();
  return {};
}

std::string ReadText(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return "";
  std::stringstream ss;
  ss << in.rdbuf();
  return ss.str();
}

// Records (seq -> hash) of a session, for receipt checks.
absl::StatusOr<std::optional<std::string>> HashAt(sqlite3* db, const std::string& session,
                                                  uint64_t seq) {
  Query q(db, "SELECT hash FROM record WHERE session_id = ? AND seq = ?");
  q.Bind(session).Bind(static_cast<int64_t>(seq));
  auto row = q.Step();
  if (!row.ok()) return row.status();
  if (!*row) return std::optional<std::string>();
  return std::optional<std::string>(q.Blob(0));
}

absl::Status VerifySession(sqlite3* db, SessionVerdict* v) {
  const bool has_personal = HasColumn(db, "personal", "salt");
  std::map<uint64_t, std::pair<std::string, std::string>> personal;  // seq -> salt, content
  if (has_personal) {
    Query p(db, "SELECT seq, salt, content FROM personal WHERE session_id = ?");
    p.Bind(v->session_id);
    while (true) {
      auto row = p.Step();
      if (!row.ok()) return row.status();
      if (!*row) break;
      personal[static_cast<uint64_t>(p.Int(0))] = {p.Blob(1), p.Blob(2)};
    }
  }
  Query q(db, "SELECT seq, body, hash FROM record WHERE session_id = ? ORDER BY seq");
  q.Bind(v->session_id);
  std::string prev(32, '\0');  // before sequence 1: 32 zero bytes
  uint64_t expected = 1;
  std::vector<uint64_t> missing;  // sealed records whose content is not kept
  std::set<uint64_t> erased;      // named by Erasure records
  auto broken = [v](uint64_t seq, std::string what) {
    v->ok = false;
    v->broken_sequence = seq;
    v->problem = std::move(what);
  };
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    const uint64_t seq = static_cast<uint64_t>(q.Int(0));
    const std::string body = q.Blob(1);
    const std::string hash = q.Blob(2);
    if (seq != expected) {
      broken(expected,
             seq == expected + 1
                 ? Cat("missing: record ", expected, " is not in the ledger")
                 : Cat("missing: records ", expected, "..", seq - 1, " are not in the ledger"));
      return absl::OkStatus();
    }
    Record r;
    if (!r.ParseFromString(body)) {
      broken(seq, "body does not parse as a record (bytes altered)");
      return absl::OkStatus();
    }
    if (r.session_id() != v->session_id) {
      broken(seq, Cat("misplaced: the body belongs to session '", r.session_id(), "'"));
      return absl::OkStatus();
    }
    if (r.sequence() != seq) {
      broken(seq, Cat("reordered: row ", seq, " holds record ", r.sequence()));
      return absl::OkStatus();
    }
    if (Sha256Of(prev, body) != hash) {
      broken(seq,
             "hash mismatch: the stored hash is not SHA-256(previous hash || body); the record, "
             "its hash or an earlier hash was altered");
      return absl::OkStatus();
    }
    if (std::string_view digest = DigestOf(r); !digest.empty()) {
      auto it = personal.find(seq);
      if (it == personal.end()) {
        missing.push_back(seq);
      } else if (Sha256Of(it->second.first, it->second.second) != digest) {
        broken(seq, "personal content altered: SHA-256(salt || content) is not the digest");
        return absl::OkStatus();
      } else {
        ++v->personal_kept;
      }
    }
    if (r.has_erasure())
      erased.insert(r.erasure().sequences().begin(), r.erasure().sequences().end());
    prev = hash;
    ++expected;
    ++v->records;
  }
  v->head_hash = v->records > 0 ? prev : std::string();
  for (uint64_t seq : missing) {
    if (erased.count(seq) == 0) {
      broken(seq, "personal content missing, and no Erasure record names this record");
      return absl::OkStatus();
    }
    ++v->personal_erased;
  }
  return absl::OkStatus();
}

// The stored receipt of a session against the chain in the file.
absl::Status CheckStoredReceipt(sqlite3* db, SessionVerdict* v) {
  if (!HasColumn(db, "receipt", "message")) {
    v->stored_receipt = "none";
    return absl::OkStatus();
  }
  Query q(db,
          "SELECT last_seq, head_hash, message, signature, public_key_pem FROM receipt "
          "WHERE session_id = ?");
  q.Bind(v->session_id);
  auto row = q.Step();
  if (!row.ok()) return row.status();
  if (!*row) {
    v->stored_receipt = "none";
    return absl::OkStatus();
  }
  const uint64_t seq = static_cast<uint64_t>(q.Int(0));
  auto at = HashAt(db, v->session_id, seq);
  if (!at.ok()) return at.status();
  std::string problem;
  if (!at->has_value()) {
    problem = Cat("the stored receipt names record ", seq, ", which is missing");
  } else if (**at != q.Blob(1)) {
    problem = Cat("the stored receipt's head hash differs from record ", seq, "'s hash");
  } else if (!VerifySignature(q.Text(4), q.Blob(2), q.Blob(3)).ok()) {
    problem = "the stored receipt's signature does not verify";
  }
  if (problem.empty()) {
    v->stored_receipt = Cat("matches (record ", seq, ")");
  } else {
    v->stored_receipt = problem;
    if (v->ok) {
      v->ok = false;
      v->broken_sequence = seq;
      v->problem = problem;
    }
  }
  return absl::OkStatus();
}

}  // namespace

bool VerifyResult::ok() const {
  for (const SessionVerdict& v : sessions) {
    if (!v.ok) return false;
  }
  return !receipt_given || receipt_ok;
}

absl::StatusOr<std::pair<tickmark::v1::Receipt, std::string>> ReadStoredReceipt(
    const std::string& ledger_path, const std::string& session_id) {
  auto db = OpenReadOnly(ledger_path);
  if (!db.ok()) return db.status();
  if (!HasColumn(db->get(), "receipt", "message")) {
    return absl::NotFoundError(Cat("this ledger keeps no receipts (", ledger_path, ")"));
  }
  Query q(db->get(), "SELECT message, signature, public_key_pem FROM receipt WHERE session_id = ?");
  q.Bind(session_id);
  auto row = q.Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError(Cat("no receipt for session '", session_id, "'"));
  // Rebuild the file form through the parser so that one code reads both.
  tickmark::v1::Receipt sig_only;
  sig_only.set_message(q.Blob(0));
  sig_only.set_signature(q.Blob(1));
  auto parsed = ParseReceiptFile(ReceiptFileText(sig_only));
  if (!parsed.ok()) return parsed.status();
  return std::make_pair(*parsed, q.Text(2));
}

absl::StatusOr<VerifyResult> VerifyLedgerFile(const VerifyOptions& options) {
  auto db = OpenReadOnly(options.ledger_path);
  if (!db.ok()) return db.status();
  sqlite3* raw = db->get();
  const bool versions = HasColumn(raw, "session", "chain_version");
  std::string only = options.session;
  if (options.receipt) {
    if (!only.empty() && only != options.receipt->session_id()) {
      return absl::InvalidArgumentError(
          Cat("the receipt is for session ", options.receipt->session_id(), ", not ", only));
    }
    only = options.receipt->session_id();
  }
  Query q(raw, Cat("SELECT id, ", versions ? "chain_version" : "1", " FROM session",
                   only.empty() ? "" : " WHERE id = ?", " ORDER BY id"));
  if (!only.empty()) q.Bind(only);
  VerifyResult result;
  while (true) {
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    SessionVerdict v;
    v.session_id = q.Text(0);
    v.chain_version = static_cast<uint32_t>(q.Int(1));
    if (absl::Status s = VerifySession(raw, &v); !s.ok()) return s;
    if (absl::Status s = CheckStoredReceipt(raw, &v); !s.ok()) return s;
    result.sessions.push_back(std::move(v));
  }
  if (!only.empty() && result.sessions.empty()) {
    return absl::NotFoundError(Cat("no session '", only, "' in ", options.ledger_path));
  }
  if (!options.receipt) return result;

  // The given receipt.
  const tickmark::v1::Receipt& r = *options.receipt;
  result.receipt_given = true;
  std::string pem = options.public_key_pem;
  result.key_source = "--public-key";
  if (pem.empty()) {
    std::filesystem::path beside =
        std::filesystem::path(options.ledger_path).parent_path() / kReceiptPublicKeyFile;
    pem = ReadText(beside.string());
    result.key_source = beside.string();
  }
  if (pem.empty() && HasColumn(raw, "receipt", "public_key_pem")) {
    Query k(raw, "SELECT public_key_pem FROM receipt WHERE public_key_sha256 = ? LIMIT 1");
    k.BindBlob(r.public_key_sha256());
    auto row = k.Step();
    if (row.ok() && *row) {
      pem = k.Text(0);
      result.key_source =
          "the key stored in the ledger file itself (shows only that the file agrees with "
          "itself: compare the key's SHA-256 with the server's)";
    }
  }
  auto fail = [&result](std::string why) {
    result.receipt_ok = false;
    result.receipt_detail = std::move(why);
    return result;
  };
  if (pem.empty()) {
    return fail("no public key: give --public-key (the server's receipt-key.pub.pem)");
  }
  auto sha = PublicKeySha256(pem);
  if (!sha.ok()) return fail(Cat("public key: ", sha.status().message()));
  if (*sha != r.public_key_sha256()) {
    return fail(Cat("the receipt was signed by another key (",
                    absl::BytesToHexString(r.public_key_sha256()), ") than the one given (",
                    absl::BytesToHexString(*sha), ")"));
  }
  if (absl::Status s = VerifySignature(pem, r.message(), r.signature()); !s.ok()) {
    return fail("the receipt's signature does not verify: the receipt was altered");
  }
  const SessionVerdict& v = result.sessions.front();
  if (!v.ok) {
    return fail(
        Cat("the session's chain is broken at record ", v.broken_sequence, ": ", v.problem));
  }
  auto at = HashAt(raw, r.session_id(), r.last_sequence());
  if (!at.ok()) return at.status();
  if (!at->has_value()) {
    return fail(Cat("record ", r.last_sequence(),
                    " named by the receipt is missing: the ledger "
                    "was cut after the receipt"));
  }
  if (**at != r.head_hash()) {
    return fail(Cat("record ", r.last_sequence(), " has hash ", absl::BytesToHexString(**at),
                    " but the receipt says ", absl::BytesToHexString(r.head_hash()),
                    ": the chain was rewritten after the receipt"));
  }
  result.receipt_ok = true;
  result.receipt_detail =
      Cat("signature verifies; record ", r.last_sequence(),
          " has the receipt's head hash and the "
          "chain verifies through record ",
          v.records, ": records 1..", r.last_sequence(),
          " are as they were when the receipt was signed (", r.signed_utc(), ")");
  return result;
}

}  // namespace tickmark::audit

// Recomputes a ledger file's hash chains from its stored bytes (docs/audit.md,
// "Verify"): read-only, with no server, so it works on a copy. For every
// session, in sequence order: no gaps, each row holds the record its row says
// (session and sequence inside the body), hash = SHA-256(previous hash ||
// body), and in chain version 2 each kept personal content matches its
// digest and each missing one is covered by an Erasure record. A receipt
// (given, or stored in the file) must name a record whose hash is its head
// hash, and its Ed25519 signature must verify.
//
// This is a second implementation of the chain from the documented bytes
// (DEVELOPERS.md, "The ledger"), not a call into the ledger's code: an
// auditor's check should not share the writer's mistakes.
//
// Thread safety: free functions, no shared state.
#ifndef TICKMARK_SERVER_AUDIT_CHAIN_VERIFIER_H_
#define TICKMARK_SERVER_AUDIT_CHAIN_VERIFIER_H_

#include <cstdint>
#include <optional>
#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::audit {

struct VerifyOptions {
  std::string ledger_path;
  std::string session;  // empty: every session
  // A receipt to prove the ledger against (its session is then verified).
  std::optional<tickmark::v1::Receipt> receipt;
  // The server's public key (PEM). Empty: receipt-key.pub.pem beside the
  // ledger, else the key stored with the receipt in the file (which only
  // shows the file agrees with itself; say so).
  std::string public_key_pem;
};

struct SessionVerdict {
  std::string session_id;
  uint32_t chain_version = 1;
  uint64_t records = 0;          // rows checked
  std::string head_hash;         // hash of the last record checked (raw)
  uint64_t personal_kept = 0;    // personal contents matching their digests
  uint64_t personal_erased = 0;  // personal contents erased (covered by Erasure records)
  bool ok = true;
  uint64_t broken_sequence = 0;  // the first broken record
  std::string problem;           // what is wrong there
  std::string stored_receipt;    // "none", "matches", or what does not
};

struct VerifyResult {
  std::vector<SessionVerdict> sessions;
  bool receipt_given = false;
  bool receipt_ok = false;
  std::string receipt_detail;  // what was proven, or what failed
  std::string key_source;      // where the public key came from
  bool ok() const;
};

// NOT_FOUND for a missing file or unknown session; INVALID_ARGUMENT for a
// file that is not a tickmark ledger; otherwise the verdicts.
absl::StatusOr<VerifyResult> VerifyLedgerFile(const VerifyOptions& options);

// The receipt stored for a session in a ledger file (table `receipt`), with
// the public key stored beside it; NOT_FOUND if none.
absl::StatusOr<std::pair<tickmark::v1::Receipt, std::string>> ReadStoredReceipt(
    const std::string& ledger_path, const std::string& session_id);

}  // namespace tickmark::audit

#endif  // TICKMARK_SERVER_AUDIT_CHAIN_VERIFIER_H_

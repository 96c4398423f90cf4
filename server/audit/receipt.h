// Close receipts (docs/audit.md, "Receipts"): what a session's ledger held
// when it closed, signed with the server's Ed25519 key.
//
// The receipt file is text. Its first seven lines are the message, exactly
// the bytes signed (UTF-8, each line ending in one LF):
//
//   tickmark receipt 1
//   session: s-7f3a2c91
//   last_sequence: 412
//   head_hash: <64 lowercase hex digits: the hash of record last_sequence>
//   chain_version: 2
//   signed_utc: 2026-12-03T10:15:02.123456789Z
//   public_key_sha256: <64 hex digits: SHA-256 of the key's DER SubjectPublicKeyInfo>
//
// followed by one line "signature: <base64 of the 64-byte Ed25519 signature
// (RFC 8032) of the message>". Any Ed25519 verifier can check it, e.g.
// `openssl pkeyutl -verify -pubin -inkey receipt-key.pub.pem -rawin -in msg
// -sigfile sig` on the message and the decoded signature.
//
// Thread safety: free functions are thread-safe; a ReceiptKey may be used
// from any thread once loaded (it is immutable).
#ifndef TICKMARK_SERVER_AUDIT_RECEIPT_H_
#define TICKMARK_SERVER_AUDIT_RECEIPT_H_

#include <memory>
#include <string>
#include <string_view>

#include "absl/status/statusor.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::audit {

// File names of the key pair in the server's data folder.
inline constexpr const char* kReceiptKeyFile = "receipt-key.pem";  // private, mode 0600
inline constexpr const char* kReceiptPublicKeyFile = "receipt-key.pub.pem";

// UTC time as RFC 3339 with nine fraction digits ("2026-12-03T10:15:02.123456789Z").
std::string Rfc3339Nanos(int64_t unix_ns);

// The message of a receipt: the exact bytes signed, built from its fields
// (session_id, last_sequence, head_hash, chain_version, signed_utc,
// public_key_sha256).
std::string ReceiptMessage(const tickmark::v1::Receipt& receipt);
// The receipt file: the message, then the signature line.
std::string ReceiptFileText(const tickmark::v1::Receipt& receipt);
// Parses a receipt file; INVALID_ARGUMENT naming the line that is wrong.
absl::StatusOr<tickmark::v1::Receipt> ParseReceiptFile(std::string_view text);

// SHA-256 of a PEM public key's DER SubjectPublicKeyInfo; INVALID_ARGUMENT if
// it is not an Ed25519 public key.
absl::StatusOr<std::string> PublicKeySha256(std::string_view public_pem);
// OK if `signature` is the Ed25519 signature of `message` under the key;
// FAILED_PRECONDITION ("signature does not verify") if not.
absl::Status VerifySignature(std::string_view public_pem, std::string_view message,
                             std::string_view signature);

// The server's signing key.
class ReceiptKey {
 public:
  // Loads DIR/receipt-key.pem, or makes a new Ed25519 key there (mode 0600)
  // with its public half in DIR/receipt-key.pub.pem. A key file readable by
  // others is refused.
  static absl::StatusOr<std::shared_ptr<const ReceiptKey>> LoadOrCreate(const std::string& dir);
  ~ReceiptKey();

  // Fills message, signature and public_key_sha256 of `receipt` (its other
  // fields set by the caller).
  absl::Status Sign(tickmark::v1::Receipt* receipt) const;
  const std::string& public_pem() const { return public_pem_; }
  const std::string& public_sha256() const { return public_sha256_; }

 private:
  ReceiptKey() = default;
  void* pkey_ = nullptr;  // EVP_PKEY*
  std::string public_pem_;
  std::string public_sha256_;
};

}  // namespace tickmark::audit

#endif  // TICKMARK_SERVER_AUDIT_RECEIPT_H_

#include "server/rpc/auth.h"

#include <openssl/err.h>
#include <openssl/rand.h>

#include "absl/strings/escaping.h"
#include "absl/strings/string_view.h"
#include "server/base/sha256.h"
#include "server/base/strings.h"

namespace tickmark::rpc {

namespace {

absl::string_view AbslView(const std::string& s) { return absl::string_view(s.data(), s.size()); }

// n bytes from OpenSSL's CSPRNG, or an error: never fewer, never weaker.
absl::StatusOr<std::string> RandomBytes(size_t n) {
  std::string raw(n, '\0');
  // OpenSSL docs, RAND_bytes(3): returns 1 on success.
  if (RAND_bytes(reinterpret_cast<unsigned char*>(raw.data()), static_cast<int>(n)) != 1) {
    ERR_clear_error();
    return absl::UnavailableError("no random bytes from OpenSSL (RAND_bytes failed)");
  }
  return raw;
}

}  // namespace

absl::StatusOr<std::string> RandomHex(size_t bytes) {
  auto raw = RandomBytes(bytes);
  if (!raw.ok()) return raw.status();
  return absl::BytesToHexString(AbslView(*raw));
}

absl::StatusOr<std::string> NewSecret() {
  auto raw = RandomBytes(32);
  if (!raw.ok()) return raw.status();
  // base64url without padding (RFC 4648 §5).
  return "tmk_" + absl::WebSafeBase64Escape(AbslView(*raw));
}

absl::StatusOr<std::string> HashSecret(std::string_view secret) { return Sha256(secret); }

std::string_view BearerSecret(std::string_view authorization) {
  constexpr std::string_view kBearer = "Bearer ";
  if (authorization.substr(0, kBearer.size()) == kBearer) {
    return authorization.substr(kBearer.size());
  }
  return authorization;
}

bool IsValidName(std::string_view name) {
  if (name.empty() || name.size() > 64) return false;
  for (char c : name) {
    bool ok = (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') ||
              c == '-' || c == '_' || c == '.' || c == ':';
    if (!ok) return false;
  }
  return true;
}

absl::StatusOr<Principal> TokenAuthority::Authenticate(std::string_view secret) const {
  if (secret.empty()) {
    return absl::UnauthenticatedError(
        "no token: send 'authorization: Bearer <token>' metadata (or the token in the hello)");
  }
  if (secret.size() > 200 || secret.substr(0, 4) != "tmk_") {
    return absl::UnauthenticatedError("malformed token");
  }
  auto hash = HashSecret(secret);
  if (!hash.ok()) return hash.status();
  auto row = ledger_->FindTokenByHash(*hash);
  if (absl::IsNotFound(row.status())) return absl::UnauthenticatedError("unknown token");
  if (!row.ok()) return row.status();
  if (row->revoked) return absl::UnauthenticatedError(Cat("token ", row->id, " has been revoked"));
  return Principal{row->id, row->session_id, row->role, row->subject};
}

absl::StatusOr<std::pair<ledger::TokenRow, std::string>> TokenAuthority::Issue(
    std::string_view session_id, tickmark::v1::Role role, std::string_view subject,
    int64_t now_session_ns) {
  auto id = RandomHex(4);
  if (!id.ok()) return id.status();
  auto secret = NewSecret();
  if (!secret.ok()) return secret.status();
  auto hash = HashSecret(*secret);
  if (!hash.ok()) return hash.status();
  ledger::TokenRow row;
  row.id = "t-" + *id;
  row.session_id = std::string(session_id);
  row.role = role;
  row.subject = std::string(subject);
  row.issued_session_ns = now_session_ns;
  row.hash = std::move(*hash);
  if (absl::Status s = ledger_->PutToken(row); !s.ok()) return s;
  return std::make_pair(std::move(row), std::move(*secret));
}

}  // namespace tickmark::rpc

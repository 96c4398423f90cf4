#include "server/rpc/auth.h"

#include <openssl/evp.h>
#include <openssl/rand.h>

#include "server/base/strings.h"

namespace tickmark::rpc {

std::string RandomHex(size_t bytes) {
  std::string raw(bytes, '\0');
  RAND_bytes(reinterpret_cast<unsigned char*>(raw.data()), static_cast<int>(bytes));
  static constexpr char kHex[] = "0123456789abcdef";
  std::string out;
  for (unsigned char c : raw) {
    out += kHex[c >> 4];
    out += kHex[c & 15];
  }
  return out;
}

std::string NewSecret() {
  unsigned char raw[32];
  RAND_bytes(raw, sizeof raw);
  static constexpr char kAlphabet[] =
      "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-_";
  // base64url without padding (RFC 4648 §5).
  std::string out = "tmk_";
  uint32_t acc = 0;
  int bits = 0;
  for (unsigned char c : raw) {
    acc = (acc << 8) | c;
    bits += 8;
    while (bits >= 6) {
      bits -= 6;
      out += kAlphabet[(acc >> bits) & 63];
    }
  }
  if (bits > 0) out += kAlphabet[(acc << (6 - bits)) & 63];
  return out;
}

std::string HashSecret(std::string_view secret) {
  unsigned char digest[EVP_MAX_MD_SIZE];
  unsigned int len = 0;
  EVP_Digest(secret.data(), secret.size(), digest, &len, EVP_sha256(), nullptr);
  return std::string(reinterpret_cast<char*>(digest), len);
}

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
  auto row = ledger_->FindTokenByHash(HashSecret(secret));
  if (absl::IsNotFound(row.status())) return absl::UnauthenticatedError("unknown token");
  if (!row.ok()) return row.status();
  if (row->revoked) return absl::UnauthenticatedError(Cat("token ", row->id, " has been revoked"));
  return Principal{row->id, row->session_id, row->role, row->subject};
}

absl::StatusOr<std::pair<ledger::TokenRow, std::string>> TokenAuthority::Issue(
    std::string_view session_id, tickmark::v1::Role role, std::string_view subject,
    int64_t now_session_ns) {
  ledger::TokenRow row;
  row.id = "t-" + RandomHex(4);
  row.session_id = std::string(session_id);
  row.role = role;
  row.subject = std::string(subject);
  row.issued_session_ns = now_session_ns;
  std::string secret = NewSecret();
  row.hash = HashSecret(secret);
  if (absl::Status s = ledger_->PutToken(row); !s.ok()) return s;
  return std::make_pair(std::move(row), std::move(secret));
}

}  // namespace tickmark::rpc

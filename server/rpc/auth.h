// Tokens (docs/architecture.md §7): every call carries a secret token naming one
// session and one role. Only SHA-256 of the secret is stored; the secret is
// shown once, when issued.
//
// Secret format: "tmk_" + 43 base64url characters (32 random bytes). The
// public token id ("t-" + 8 hex) is what operators list and revoke.
//
// Thread-safe: lookups go to the ledger (whose reads are thread-safe).
#ifndef TICKMARK_SERVER_RPC_AUTH_H_
#define TICKMARK_SERVER_RPC_AUTH_H_

#include <string>
#include <string_view>

#include "absl/status/statusor.h"
#include "server/ledger/ledger.h"

namespace tickmark::rpc {

// Random ids and secrets from OpenSSL's CSPRNG; UNAVAILABLE when it gives no
// bytes (never a weaker fallback). RandomHex: 2·bytes lower-case hex digits.
absl::StatusOr<std::string> RandomHex(size_t bytes);
absl::StatusOr<std::string> NewSecret();
// SHA-256 of the secret, 32 raw bytes; INTERNAL if OpenSSL fails.
absl::StatusOr<std::string> HashSecret(std::string_view secret);

// What an authenticated caller may do.
struct Principal {
  std::string token_id;
  std::string session_id;  // empty for the operator
  tickmark::v1::Role role = tickmark::v1::ROLE_UNSPECIFIED;
  std::string subject;
  bool operator_token() const { return session_id.empty() && role == tickmark::v1::ROLE_ADMIN; }
};

class TokenAuthority {
 public:
  explicit TokenAuthority(ledger::Ledger* ledger) : ledger_(ledger) {}

  // UNAUTHENTICATED for a missing, malformed, unknown or revoked token.
  absl::StatusOr<Principal> Authenticate(std::string_view secret) const;
  // Issues and stores a token; returns its row and the secret.
  absl::StatusOr<std::pair<ledger::TokenRow, std::string>> Issue(std::string_view session_id,
                                                                 tickmark::v1::Role role,
                                                                 std::string_view subject,
                                                                 int64_t now_session_ns);

 private:
  ledger::Ledger* ledger_;  // not owned
};

// Pulls "Bearer <secret>" out of an authorization metadata value.
std::string_view BearerSecret(std::string_view authorization);

// A pseudonym, agent name or client id: 1-64 of [A-Za-z0-9._:-].
bool IsValidName(std::string_view name);

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_AUTH_H_

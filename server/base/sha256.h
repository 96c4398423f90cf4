// SHA-256 (FIPS 180-4) through OpenSSL's EVP interface: the one digest the
// ledger chain, token secrets, join codes and receipts use.
#ifndef TICKMARK_SERVER_BASE_SHA256_H_
#define TICKMARK_SERVER_BASE_SHA256_H_

#include <string>
#include <string_view>

#include "absl/status/statusor.h"

namespace tickmark {

// SHA-256 of `a` followed by `b`: 32 raw bytes. INTERNAL only if OpenSSL
// fails (it cannot allocate).
absl::StatusOr<std::string> Sha256(std::string_view a, std::string_view b = {});

}  // namespace tickmark

#endif  // TICKMARK_SERVER_BASE_SHA256_H_

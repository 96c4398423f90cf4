#include "server/base/sha256.h"

#include <openssl/err.h>
#include <openssl/evp.h>

#include <memory>

#include "absl/status/status.h"

namespace tickmark {

absl::StatusOr<std::string> Sha256(std::string_view a, std::string_view b) {
  unsigned char digest[EVP_MAX_MD_SIZE];
  unsigned int len = 0;
  std::unique_ptr<EVP_MD_CTX, decltype(&EVP_MD_CTX_free)> ctx(EVP_MD_CTX_new(), &EVP_MD_CTX_free);
  // OpenSSL docs, EVP_DigestInit(3): these return 1 for success, 0 for failure.
  if (ctx == nullptr || EVP_DigestInit_ex(ctx.get(), EVP_sha256(), nullptr) != 1 ||
      EVP_DigestUpdate(ctx.get(), a.data(), a.size()) != 1 ||
      EVP_DigestUpdate(ctx.get(), b.data(), b.size()) != 1 ||
      EVP_DigestFinal_ex(ctx.get(), digest, &len) != 1 || len != 32) {
    ERR_clear_error();
    return absl::InternalError("SHA-256 failed in OpenSSL (EVP_Digest)");
  }
  return std::string(reinterpret_cast<char*>(digest), len);
}

}  // namespace tickmark

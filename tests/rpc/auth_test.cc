// Token material: ids, secrets and hashes from OpenSSL through absl's
// escaping (no hand-written base64 or hex), each call's result checked.
#include "server/rpc/auth.h"

#include <set>
#include <string>

#include "gtest/gtest.h"

namespace tickmark::rpc {
namespace {

TEST(AuthTest, HashSecretIsSha256) {
  // FIPS 180-2, Appendix B.1: SHA-256("abc").
  auto digest = HashSecret("abc");
  ASSERT_TRUE(digest.ok());
  const unsigned char want[32] = {0xba, 0x78, 0x16, 0xbf, 0x8f, 0x01, 0xcf, 0xea,
                                  0x41, 0x41, 0x40, 0xde, 0x5d, 0xae, 0x22, 0x23,
                                  0xb0, 0x03, 0x61, 0xa3, 0x96, 0x17, 0x7a, 0x9c,
                                  0xb4, 0x10, 0xff, 0x61, 0xf2, 0x00, 0x15, 0xad};
  EXPECT_EQ(*digest, std::string(reinterpret_cast<const char*>(want), 32));
}

TEST(AuthTest, SecretIsTmkAnd43Base64UrlCharacters) {
  std::set<std::string> seen;
  for (int i = 0; i < 50; ++i) {
    auto secret = NewSecret();
    ASSERT_TRUE(secret.ok());
    ASSERT_EQ(secret->size(), 4u + 43u) << *secret;  // 32 bytes, RFC 4648 §5, no padding
    EXPECT_EQ(secret->substr(0, 4), "tmk_");
    for (char c : secret->substr(4)) {
      EXPECT_TRUE(std::isalnum(static_cast<unsigned char>(c)) || c == '-' || c == '_') << *secret;
    }
    seen.insert(*secret);
  }
  EXPECT_EQ(seen.size(), 50u);
}

TEST(AuthTest, RandomHexIsLowerCaseHexOfTwiceTheBytes) {
  auto hex = RandomHex(4);
  ASSERT_TRUE(hex.ok());
  ASSERT_EQ(hex->size(), 8u);
  for (char c : *hex) EXPECT_TRUE((c >= '0' && c <= '9') || (c >= 'a' && c <= 'f')) << *hex;
}

}  // namespace
}  // namespace tickmark::rpc

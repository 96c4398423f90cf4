// Hex text to bytes, for tests that read hashes back from outside tools
// (sqlite3's hex(), sha256sum) and recompute the chain.
#ifndef TICKMARK_TESTS_SUPPORT_HEX_H_
#define TICKMARK_TESTS_SUPPORT_HEX_H_

#include <string>
#include <vector>

namespace tickmark::testing {

// "0aff" -> {0x0a, 0xff}; a trailing odd digit is ignored.
inline std::vector<char> FromHex(const std::string& hex) {
  std::vector<char> out;
  for (size_t i = 0; i + 1 < hex.size(); i += 2) {
    out.push_back(static_cast<char>(std::stoi(hex.substr(i, 2), nullptr, 16)));
  }
  return out;
}

}  // namespace tickmark::testing

#endif  // TICKMARK_TESTS_SUPPORT_HEX_H_

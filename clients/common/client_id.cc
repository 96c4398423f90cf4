#include "clients/common/client_id.h"

#include <pwd.h>
#include <unistd.h>

#include <cstdint>
#include <cstdio>
#include <string>
#include <vector>

#include "absl/strings/str_cat.h"

namespace tickmark::client {
namespace {

bool IsIdChar(char c) {
  return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') ||
         (c >= '0' && c <= '9') || c == '-' || c == '_' || c == '.' ||
         c == ':';
}

// FNV-1a, 32 bits: only needs to be stable and spread well, not secret.
uint32_t Fnv1a(std::string_view s) {
  uint32_t h = 2166136261u;
  for (char c : s) {
    h ^= static_cast<unsigned char>(c);
    h *= 16777619u;
  }
  return h;
}

}  // namespace

absl::Status ValidateClientId(std::string_view id) {
  if (id.empty()) return absl::InvalidArgumentError("client id is empty");
  if (id.size() > kMaxClientIdLength) {
    return absl::InvalidArgumentError(absl::StrCat(
        "client id is ", id.size(), " characters; at most ",
        kMaxClientIdLength, " allowed"));
  }
  for (char c : id) {
    if (!IsIdChar(c)) {
      return absl::InvalidArgumentError(absl::StrCat(
          "client id \"", std::string(id),
          "\" may hold only letters, digits, '-', '_', '.', ':'"));
    }
  }
  return absl::OkStatus();
}

std::string MakeClientId(std::string_view host, std::string_view user,
                         std::string_view program, std::string_view source) {
  std::string full;
  for (std::string_view part : {host, user, program, source}) {
    if (part.empty()) continue;
    if (!full.empty()) full += ':';
    for (char c : part) full += IsIdChar(c) ? c : '-';
  }
  if (full.empty()) full = "client";
  if (full.size() <= kMaxClientIdLength) return full;
  char suffix[10];
  std::snprintf(suffix, sizeof suffix, ".%08x", Fnv1a(full));
  return full.substr(0, kMaxClientIdLength - 9) + suffix;
}

std::string DefaultClientId(std::string_view program, std::string_view source) {
  char host[256] = {};
  if (gethostname(host, sizeof host - 1) != 0) host[0] = '\0';
  std::string user;
  std::vector<char> buf(4096);
  passwd pw{};
  passwd* found = nullptr;
  if (getpwuid_r(getuid(), &pw, buf.data(), buf.size(), &found) == 0 &&
      found != nullptr && found->pw_name != nullptr) {
    user = found->pw_name;
  } else {
    user = absl::StrCat("uid", getuid());
  }
  return MakeClientId(host, user, program, source);
}

}  // namespace tickmark::client

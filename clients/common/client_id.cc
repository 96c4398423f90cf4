#include "clients/common/client_id.h"

#include <fcntl.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <random>
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

std::string StateDir() {
  // XDG Base Directory Specification: $XDG_STATE_HOME, default $HOME/.local/state.
  if (const char* x = std::getenv("XDG_STATE_HOME"); x != nullptr && x[0] == '/') {
    return std::string(x) + "/tickmark";
  }
  if (const char* h = std::getenv("HOME"); h != nullptr && h[0] != '\0') {
    return std::string(h) + "/.local/state/tickmark";
  }
  return "";
}

std::string InstallationId(const std::string& state_dir) {
  if (state_dir.empty()) return "";
  const std::string path = state_dir + "/installation-id";
  auto read = [&path]() -> std::string {
    std::ifstream in(path);
    std::string id;
    if (!(in >> id) || id.size() != 14 || id.rfind("i-", 0) != 0 || !ValidateClientId(id).ok()) {
      return "";
    }
    return id;
  };
  if (std::string id = read(); !id.empty()) return id;
  std::error_code ec;
  std::filesystem::create_directories(state_dir, ec);
  std::random_device rd;  // /dev/urandom on Linux (libstdc++)
  char id[16];
  std::snprintf(id, sizeof id, "i-%06x%06x", rd() & 0xffffffu, rd() & 0xffffffu);
  const std::string tmp = path + "." + std::to_string(getpid()) + ".tmp";
  int fd = ::open(tmp.c_str(), O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0600);
  if (fd < 0) return "";
  const std::string line = std::string(id) + "\n";
  const bool written = ::write(fd, line.data(), line.size()) == static_cast<ssize_t>(line.size());
  ::close(fd);
  // link() fails if the name exists: a program that made it first wins.
  if (written) ::link(tmp.c_str(), path.c_str());
  ::unlink(tmp.c_str());
  return read();
}

std::string DefaultClientId(std::string_view program, std::string_view source) {
  std::string who = InstallationId(StateDir());
  if (who.empty()) {
    char host[256] = {};
    if (gethostname(host, sizeof host - 1) != 0) host[0] = '\0';
    char hashed[16];
    std::snprintf(hashed, sizeof hashed, "h-%08x",
                  Fnv1a(absl::StrCat(host, ":", static_cast<uint64_t>(getuid()))));
    who = hashed;
  }
  return MakeClientId(who, "", program, source);
}

}  // namespace tickmark::client

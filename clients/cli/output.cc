#include "clients/cli/output.h"

#include <fcntl.h>
#include <sys/stat.h>
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <cstdio>
#include <ctime>
#include <iostream>

namespace tickmark::cli {

namespace v1 = tickmark::v1;

namespace {
constexpr char kRolePrefix[] = "ROLE_";
}  // namespace

std::string FormatUtc(int64_t ns) {
  if (ns == 0) return "-";
  std::time_t secs = static_cast<std::time_t>(ns / 1'000'000'000);
  std::tm tm{};
  gmtime_r(&secs, &tm);
  char buf[40];
  std::strftime(buf, sizeof buf, "%Y-%m-%d %H:%M:%S", &tm);
  char ms[8];
  std::snprintf(ms, sizeof ms, ".%03d", static_cast<int>((ns / 1'000'000) % 1000));
  return std::string(buf) + ms + " UTC";
}

std::string FormatMillis(int64_t ns) {
  char buf[48];
  std::snprintf(buf, sizeof buf, "%.3f ms", static_cast<double>(ns) * 1e-6);
  return buf;
}

std::string RoleWord(v1::Role role) {
  std::string name = v1::Role_Name(role);
  if (name.empty()) return "?";
  name = name.substr(sizeof kRolePrefix - 1);
  for (char& c : name) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return name;
}

std::optional<v1::Role> ParseRoleWord(const std::string& word) {
  std::string name = kRolePrefix;
  for (char c : word) name += static_cast<char>(std::toupper(static_cast<unsigned char>(c)));
  v1::Role role;
  if (!v1::Role_Parse(name, &role) || role == v1::ROLE_UNSPECIFIED) return std::nullopt;
  return role;
}

std::string ShortKernelText(const std::string& description) {
  const std::string open = "counts=[";
  const size_t begin = description.find(open);
  if (begin == std::string::npos) return description;
  const size_t end = description.find(']', begin);
  if (end == std::string::npos) return description;
  const std::string counts = description.substr(begin + open.size(), end - begin - open.size());
  const size_t bins =
      counts.empty() ? 0 : 1 + static_cast<size_t>(std::count(counts.begin(), counts.end(), ','));
  return description.substr(0, begin) + "counts=<" + std::to_string(bins) + " bins>" +
         description.substr(end + 1);
}

bool WriteSecretFile(const std::string& path, const std::string& secret) {
  // Created 0600 rather than chmod-ed after writing, so the secret is never
  // readable by others, not even for a moment.
  const int fd = ::open(path.c_str(), O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0600);
  bool ok = fd >= 0 && ::fchmod(fd, 0600) == 0;
  const std::string line = secret + "\n";
  ok = ok && ::write(fd, line.data(), line.size()) == static_cast<ssize_t>(line.size());
  if (fd >= 0) ok = ::close(fd) == 0 && ok;
  if (!ok) std::cerr << "tickmark: cannot write " << path << "\n";
  return ok;
}

}  // namespace tickmark::cli

#include "server/ledger/sqlite/heads_file.h"

#include <fcntl.h>
#include <unistd.h>

#include <cerrno>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <sstream>

#include "absl/strings/escaping.h"
#include "server/base/strings.h"

namespace tickmark::ledger {
namespace {

constexpr char kVersionLine[] = "tickmark ledger heads 1";

absl::Status WriteAll(int fd, const std::string& data, const std::string& path) {
  size_t done = 0;
  while (done < data.size()) {
    const ssize_t n = write(fd, data.data() + done, data.size() - done);
    if (n < 0 && errno == EINTR) continue;
    if (n < 0) return absl::UnavailableError(Cat("write ", path, ": ", std::strerror(errno)));
    done += static_cast<size_t>(n);
  }
  return absl::OkStatus();
}

}  // namespace

absl::StatusOr<SessionHeads> HeadsFile::Read() const {
  std::ifstream in(path_);
  if (!in) {
    if (!std::filesystem::exists(path_)) return absl::NotFoundError(Cat("no ", path_));
    return absl::UnavailableError(Cat("cannot read ", path_));
  }
  std::string line;
  if (!std::getline(in, line) || line != kVersionLine) {
    return absl::DataLossError(Cat(path_, " is not a ledger heads file (first line '", line, "')"));
  }
  SessionHeads heads;
  int number = 1;
  while (std::getline(in, line)) {
    ++number;
    std::istringstream fields(line);
    uint64_t seq = 0;
    std::string hex, escaped, id, hash;
    if (fields >> seq >> hex) std::getline(fields, escaped);
    if (!escaped.empty() && escaped.front() == ' ') escaped.erase(0, 1);
    if (hex.size() != 64 || escaped.empty() || !absl::CUnescape(escaped, &id)) {
      return absl::DataLossError(Cat(path_, " line ", number, " does not parse"));
    }
    hash = absl::HexStringToBytes(hex);
    heads[id] = SessionHead{seq, hash};
  }
  return heads;
}

absl::Status HeadsFile::Write(const SessionHeads& heads) const {
  std::string text = Cat(kVersionLine, "\n");
  for (const auto& [id, head] : heads) {
    text +=
        Cat(head.sequence, " ", absl::BytesToHexString(head.hash), " ", absl::CHexEscape(id), "\n");
  }
  const std::string tmp = path_ + ".tmp";
  const int fd = open(tmp.c_str(), O_CREAT | O_TRUNC | O_WRONLY | O_CLOEXEC, 0600);
  if (fd < 0) return absl::UnavailableError(Cat("cannot write ", tmp, ": ", std::strerror(errno)));
  absl::Status s = WriteAll(fd, text, tmp);
  if (s.ok() && sync_ && fsync(fd) != 0) {
    s = absl::UnavailableError(Cat("fsync ", tmp, ": ", std::strerror(errno)));
  }
  if (close(fd) != 0 && s.ok()) {
    s = absl::UnavailableError(Cat("close ", tmp, ": ", std::strerror(errno)));
  }
  if (s.ok() && rename(tmp.c_str(), path_.c_str()) != 0) {
    s = absl::UnavailableError(Cat("rename ", tmp, ": ", std::strerror(errno)));
  }
  if (!s.ok()) {
    unlink(tmp.c_str());
    return s;
  }
  if (sync_) {
    std::string dir = std::filesystem::path(path_).parent_path().string();
    const int dfd = open(dir.empty() ? "." : dir.c_str(), O_RDONLY | O_DIRECTORY | O_CLOEXEC);
    if (dfd >= 0) {
      fsync(dfd);
      close(dfd);
    }
  }
  return absl::OkStatus();
}

}  // namespace tickmark::ledger

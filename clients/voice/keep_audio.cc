#include "clients/voice/keep_audio.h"

#include <fcntl.h>
#include <openssl/sha.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstdio>
#include <cstring>

#include "clients/voice/wav.h"

namespace tickmark::voice {

std::string Sha256(std::string_view bytes) {
  unsigned char digest[SHA256_DIGEST_LENGTH];
  SHA256(reinterpret_cast<const unsigned char*>(bytes.data()), bytes.size(), digest);
  return std::string(reinterpret_cast<const char*>(digest), sizeof digest);
}

std::string Hex(std::string_view bytes) {
  static const char kDigits[] = "0123456789abcdef";
  std::string out;
  for (unsigned char c : bytes) {
    out += kDigits[c >> 4];
    out += kDigits[c & 15];
  }
  return out;
}

absl::StatusOr<std::unique_ptr<AudioKeeper>> AudioKeeper::Open(const std::string& dir) {
  if (mkdir(dir.c_str(), 0700) != 0 && errno != EEXIST) {
    return absl::FailedPreconditionError("--keep-audio: cannot create " + dir + ": " +
                                         std::strerror(errno));
  }
  struct stat st {};
  if (stat(dir.c_str(), &st) != 0 || !S_ISDIR(st.st_mode)) {
    return absl::FailedPreconditionError("--keep-audio: " + dir + " is not a folder");
  }
  if (access(dir.c_str(), W_OK | X_OK) != 0) {
    return absl::FailedPreconditionError("--keep-audio: cannot write in " + dir + ": " +
                                         std::strerror(errno));
  }
  return std::unique_ptr<AudioKeeper>(new AudioKeeper(dir));
}

absl::StatusOr<std::string> AudioKeeper::Keep(std::span<const int16_t> samples,
                                              uint32_t sample_rate) {
  const std::string wav = EncodeWav(samples, sample_rate);
  const std::string sha = Sha256(wav);
  const std::string path = dir_ + "/pending-" + Hex(sha).substr(0, 16) + ".wav";
  const int fd = open(path.c_str(), O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0600);
  if (fd < 0) return absl::UnavailableError("cannot write " + path + ": " + std::strerror(errno));
  size_t done = 0;
  while (done < wav.size()) {
    const ssize_t n = write(fd, wav.data() + done, wav.size() - done);
    if (n < 0 && errno == EINTR) continue;
    if (n <= 0) {
      const std::string err = std::strerror(errno);
      close(fd);
      unlink(path.c_str());
      return absl::UnavailableError("cannot write " + path + ": " + err);
    }
    done += static_cast<size_t>(n);
  }
  if (close(fd) != 0)
    return absl::UnavailableError("cannot write " + path + ": " + std::strerror(errno));
  std::lock_guard<std::mutex> l(mu_);
  pending_[sha] = path;
  return sha;
}

absl::StatusOr<std::string> AudioKeeper::Rename(const std::string& sha256,
                                                const std::string& name) {
  std::lock_guard<std::mutex> l(mu_);
  auto it = pending_.find(sha256);
  if (it == pending_.end()) return absl::NotFoundError("no pending audio with that SHA-256");
  const std::string to = dir_ + "/" + name;
  // Never replace a file: another run may have used the same client id.
  if (renameat2(AT_FDCWD, it->second.c_str(), AT_FDCWD, to.c_str(), RENAME_NOREPLACE) != 0) {
    if (errno == EEXIST) {
      return absl::AlreadyExistsError(to + " exists; the audio stays as " + it->second);
    }
    return absl::UnavailableError("cannot rename " + it->second + ": " + std::strerror(errno));
  }
  pending_.erase(it);
  return to;
}

absl::StatusOr<std::string> AudioKeeper::Acknowledged(const std::string& sha256,
                                                      uint64_t client_sequence) {
  return Rename(sha256, "feedback-" + std::to_string(client_sequence) + ".wav");
}

absl::StatusOr<std::string> AudioKeeper::Rejected(const std::string& sha256,
                                                  uint64_t client_sequence) {
  return Rename(sha256, "rejected-" + std::to_string(client_sequence) + ".wav");
}

std::vector<std::string> AudioKeeper::Pending() const {
  std::lock_guard<std::mutex> l(mu_);
  std::vector<std::string> out;
  for (const auto& [sha, path] : pending_) out.push_back(path);
  return out;
}

}  // namespace tickmark::voice

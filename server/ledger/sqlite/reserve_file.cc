#include "server/ledger/sqlite/reserve_file.h"

#include <fcntl.h>
#include <unistd.h>

#include <cerrno>
#include <cstring>

#include "server/base/strings.h"

namespace tickmark::ledger {

absl::Status ReserveFile::Create() {
  if (bytes_ == 0 || held_) return absl::OkStatus();
  const int fd = open(path_.c_str(), O_CREAT | O_WRONLY | O_CLOEXEC, 0600);
  if (fd < 0) {
    return absl::UnavailableError(Cat("cannot create ", path_, ": ", std::strerror(errno)));
  }
  const int rc = posix_fallocate(fd, 0, static_cast<off_t>(bytes_));  // returns an errno value
  close(fd);
  if (rc != 0) {
    unlink(path_.c_str());
    const std::string why =
        Cat("cannot reserve ", bytes_, " bytes in ", path_, ": ", std::strerror(rc));
    return rc == ENOSPC || rc == EFBIG ? absl::ResourceExhaustedError(why)
                                       : absl::UnavailableError(why);
  }
  held_ = true;
  return absl::OkStatus();
}

void ReserveFile::Release() {
  if (bytes_ == 0) return;
  unlink(path_.c_str());
  held_ = false;
}

}  // namespace tickmark::ledger

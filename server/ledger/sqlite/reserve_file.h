// A preallocated file beside the ledger (<ledger>.reserve) whose only job
// is to hold disk space: when SQLite reports a full disk the ledger deletes
// it, and the space freed lets the server commit its own "writes failing"
// row and shut down cleanly. It is made again once the disk has room.
//
// Thread safety: none; the ledger's writer thread (and Open) use it.
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_RESERVE_FILE_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_RESERVE_FILE_H_

#include <cstdint>
#include <string>

#include "absl/status/status.h"

namespace tickmark::ledger {

class ReserveFile {
 public:
  // bytes == 0 turns the reserve off (Create and Release do nothing).
  ReserveFile(std::string path, uint64_t bytes) : path_(std::move(path)), bytes_(bytes) {}

  // Makes the file hold `bytes` allocated bytes (posix_fallocate, so the
  // blocks are really taken). RESOURCE_EXHAUSTED when the disk lacks them;
  // a partial file is removed.
  absl::Status Create();
  // Deletes the file, returning its space to the file system.
  void Release();

  bool held() const { return held_; }
  uint64_t bytes() const { return bytes_; }
  const std::string& path() const { return path_; }

 private:
  std::string path_;   // <ledger>.reserve
  uint64_t bytes_;     // its size; 0 = no reserve
  bool held_ = false;  // the file exists with its full size
};

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_RESERVE_FILE_H_

// The side file <ledger>.heads: every session's last committed sequence and
// head hash, rewritten (temp file + rename, so a reader sees the old or the
// new file, never a torn one) after commits: after each batch under
// synchronous=FULL; under NORMAL when the writer has caught up, before a
// barrier (Flush) fires and at least every 20 ms under sustained load
// (SqliteLedger::WriteHeadsIfDue).
//
// Why: SQLite silently drops WAL frames it cannot trust (a damaged or
// removed -wal file after a kill), so a ledger can open "fine" without
// records that were acknowledged. At start the ledger compares its heads
// with this file; a session the file says is further along has lost
// records. The file is written only after COMMIT returns, so it may lag the
// ledger (harmless) but never leads it.
//
// Format (text, one session a line after a version line):
//   tickmark ledger heads 1
//   <sequence> <head hash, 64 hex digits> <session id, C-escaped>
//
// Thread safety: none; one writer (the ledger's writer thread or Open).
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_HEADS_FILE_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_HEADS_FILE_H_

#include <cstdint>
#include <functional>
#include <map>
#include <string>

#include "absl/status/status.h"
#include "absl/status/statusor.h"

namespace tickmark::ledger {

// Where a session's committed chain ends.
struct SessionHead {
  uint64_t sequence = 0;                     // 0: no record yet
  std::string hash = std::string(32, '\0');  // hash of that record (zeros before the first)
};
using SessionHeads = std::map<std::string, SessionHead, std::less<>>;

class HeadsFile {
 public:
  // sync: fsync the file and its folder on each write (for synchronous=FULL
  // ledgers; otherwise the page cache is as durable as the WAL itself).
  HeadsFile(std::string path, bool sync) : path_(std::move(path)), sync_(sync) {}

  // NOT_FOUND when the file does not exist; DATA_LOSS when it does not parse.
  absl::StatusOr<SessionHeads> Read() const;
  absl::Status Write(const SessionHeads& heads) const;

  const std::string& path() const { return path_; }

 private:
  std::string path_;  // <ledger>.heads
  bool sync_;         // fsync on write
};

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_HEADS_FILE_H_

#include "server/ledger/sqlite/startup_checks.h"

#include <sqlite3.h>

#include <filesystem>
#include <fstream>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/ledger/sqlite/statement.h"

namespace tickmark::ledger {
namespace {

namespace fs = std::filesystem;
using Clock = std::chrono::steady_clock;

struct CheckProgress {
  std::string path;
  Clock::time_point start;
  Clock::time_point next_log;
  std::chrono::milliseconds limit;
  bool timed_out = false;
};

// SQLite docs: sqlite3_progress_handler — a nonzero return interrupts the
// statement (SQLITE_INTERRUPT).
int OnProgress(void* arg) {
  auto* p = static_cast<CheckProgress*>(arg);
  const auto now = Clock::now();
  if (p->limit.count() > 0 && now - p->start > p->limit) {
    p->timed_out = true;
    return 1;
  }
  if (now >= p->next_log) {
    p->next_log = now + std::chrono::seconds(5);
    TM_LOG(kInfo) << "checking ledger " << p->path << " (PRAGMA quick_check): "
                  << std::chrono::duration_cast<std::chrono::seconds>(now - p->start).count()
                  << " s so far";
  }
  return 0;
}

}  // namespace

absl::Status DamagedLedger(const std::string& path, const std::string& detail) {
  const std::string stem = fs::path(path).replace_extension("").string();
  return absl::DataLossError(
      Cat("ledger ", path, " is damaged (", detail, "); tickmarkd will not start on it.\n",
          "To recover: stop tickmarkd, keep the damaged copy as it is, and copy what SQLite can "
          "still read into a new file with the sqlite3 program:\n",
          "  sqlite3 ", path, " .dump | sqlite3 ", stem, ".recovered.db\n",
          "  (it names the damaged rows it cannot copy; the rest are copied)\n",
          "  (a sqlite3 whose .recover command works, 3.41 or later, rescues more: use .recover "
          "instead of .dump)\n",
          "  mkdir ", path, ".damaged && mv ", path, " ", path, "-wal ", path, "-shm ", path,
          ".damaged/   (whichever exist)\n", "  mv ", stem, ".recovered.db ", path, "\n", "Leave ",
          path,
          ".heads in place: the next start compares it with the recovered ledger "
          "and lists any records the recovery lost (accept them with --accept-lost-records). Then "
          "check each session's hash chain (DEVELOPERS.md, \"The ledger\", gives the exact bytes "
          "hashed)."));
}

absl::Status CheckFileLength(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return absl::OkStatus();
  unsigned char h[100] = {};
  in.read(reinterpret_cast<char*>(h), sizeof h);
  if (in.gcount() < static_cast<std::streamsize>(sizeof h)) return absl::OkStatus();
  auto be32 = [&h](int at) {
    return (uint64_t{h[at]} << 24) | (uint64_t{h[at + 1]} << 16) | (uint64_t{h[at + 2]} << 8) |
           uint64_t{h[at + 3]};
  };
  uint64_t page_size = (uint64_t{h[16]} << 8) | h[17];
  if (page_size == 1) page_size = 65536;  // SQLite file format §1.3.2
  const uint64_t pages = be32(28);
  if (be32(24) != be32(92) || pages == 0 || page_size < 512) return absl::OkStatus();
  std::error_code ec;
  const uint64_t size = std::filesystem::file_size(path, ec);
  if (ec) return absl::OkStatus();
  if (size < pages * page_size || size % page_size != 0) {
    return DamagedLedger(path, Cat("the file is ", size, " bytes, but its header says ", pages,
                                   " pages of ", page_size, " bytes (", pages * page_size,
                                   "): it was cut short"));
  }
  return absl::OkStatus();
}

absl::Status CheckLedgerPresence(const std::string& path, const std::vector<std::string>& evidence,
                                 bool allow_new, bool* is_new, bool* replaces_old) {
  *replaces_old = false;
  std::error_code ec;
  const bool exists = fs::exists(path, ec);
  const bool empty = exists && fs::file_size(path, ec) == 0 && !ec;
  *is_new = !exists || empty;
  if (!*is_new) return absl::OkStatus();
  std::vector<std::string> found;
  for (const std::string& e : evidence) {
    if (!e.empty() && fs::exists(e, ec)) found.push_back(e);
  }
  if (found.empty()) {
    if (empty) {
      TM_LOG(kWarning) << "ledger " << path << " is an empty file; starting a new ledger";
    }
    return absl::OkStatus();
  }
  std::string list;
  for (const std::string& f : found) list += Cat(list.empty() ? "" : ", ", f);
  if (allow_new) {
    TM_LOG(kWarning) << "ledger " << path << (exists ? " is empty" : " is missing") << " although "
                     << list << " exist; starting a NEW ledger as asked (--new-ledger)";
    *replaces_old = true;
    return absl::OkStatus();
  }
  return absl::FailedPreconditionError(
      Cat("ledger ", path, exists ? " is an empty file" : " does not exist", ", but ", list,
          found.size() == 1 ? " exists" : " exist",
          ": a ledger existed here, and starting would begin with every session gone.\n",
          "If the ledger was moved, point tickmarkd at it. If it was lost, restore it from a "
          "backup. To start a new, empty ledger on purpose, start once with --new-ledger (a new "
          "operator token is then issued)."));
}

absl::Status QuickCheck(sqlite3* db, const std::string& path, std::chrono::milliseconds limit) {
  CheckProgress progress{path, Clock::now(), Clock::now() + std::chrono::seconds(5), limit};
  sqlite3_progress_handler(db, 10000, &OnProgress, &progress);
  std::vector<std::string> problems;
  absl::Status s;
  {
    // SQLite docs: PRAGMA quick_check(N) returns "ok" or up to N problems.
    Statement q(db, "PRAGMA quick_check(10)");
    while (true) {
      auto row = q.Step();
      if (!row.ok()) {
        s = row.status();
        break;
      }
      if (!*row) break;
      std::string line = q.Text(0);
      for (char& ch : line) {
        if (ch == '\n') ch = ' ';
      }
      if (line != "ok") problems.push_back(line);
    }
    if (s.ok() && !q.status().ok()) s = q.status();
  }
  sqlite3_progress_handler(db, 0, nullptr, nullptr);
  if (progress.timed_out) {
    TM_LOG(kWarning) << "ledger " << path << ": PRAGMA quick_check did not finish within "
                     << limit.count() << " ms; starting without a full check (run "
                     << "`sqlite3 " << path << " 'PRAGMA integrity_check'` while it is stopped)";
    return absl::OkStatus();
  }
  if (!s.ok()) {
    if (absl::IsDataLoss(s)) return DamagedLedger(path, std::string(s.message()));
    return s;
  }
  if (!problems.empty()) {
    std::string detail = "PRAGMA quick_check: ";
    for (size_t i = 0; i < problems.size() && i < 3; ++i) detail += Cat(i ? "; " : "", problems[i]);
    return DamagedLedger(path, detail);
  }
  const auto took = Clock::now() - progress.start;
  if (took > std::chrono::seconds(1)) {
    TM_LOG(kInfo) << "ledger " << path << " checked (PRAGMA quick_check) in "
                  << std::chrono::duration_cast<std::chrono::milliseconds>(took).count() << " ms";
  }
  return absl::OkStatus();
}

std::vector<std::string> CompareHeads(const SessionHeads& side, const SessionHeads& ledger) {
  std::vector<std::string> findings;
  for (const auto& [id, want] : side) {
    auto it = ledger.find(id);
    const uint64_t have = it == ledger.end() ? 0 : it->second.sequence;
    if (have < want.sequence) {
      findings.push_back(Cat("session ", id, ": records ", have + 1, "..", want.sequence,
                             " missing (ledger ends at ", have, ")"));
    } else if (have == want.sequence && it->second.hash != want.hash) {
      findings.push_back(Cat("session ", id, ": record ", have,
                             " differs from the one committed (hash mismatch)"));
    }
  }
  return findings;
}

absl::Status LostRecords(const std::string& path, const std::string& heads_path,
                         const std::vector<std::string>& findings) {
  std::string list;
  for (size_t i = 0; i < findings.size() && i < 20; ++i) list += Cat("  ", findings[i], "\n");
  if (findings.size() > 20) list += Cat("  ... and ", findings.size() - 20, " more sessions\n");
  return absl::DataLossError(
      Cat("ledger ", path, " lacks records that were committed (its side file ", heads_path,
          " says so); the -wal file was probably damaged or removed after a crash:\n", list,
          "tickmarkd will not start on it. If a copy of the missing ", path,
          "-wal exists, put it back next to the ledger and start again. To accept the loss "
          "and go on with what the ledger holds, start once with --accept-lost-records "
          "(the loss is then written to the ledger_event table)."));
}

}  // namespace tickmark::ledger

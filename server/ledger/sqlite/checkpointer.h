// Copies the ledger's WAL into the database file on its own thread and its
// own connection, so the writer thread does not stop for the copy.
//
// SQLite's own automatic checkpoint runs inside the commit that takes the WAL
// past 1000 pages, on the writer: copying those pages (about 4 MiB) held every
// append behind it for 15-20 ms at a time (fanout_bench, December 2026). Here
// the writer's WAL hook only asks; this thread runs PASSIVE checkpoints, which
// never block the writer (SQLite docs: sqlite3_wal_checkpoint_v2, "PASSIVE").
//
// A WAL starts again from its beginning only when a write transaction begins
// with every frame copied (SQLite docs: "Write-Ahead Logging", checkpoint
// starvation), which a checkpoint running beside a busy writer rarely leaves.
// So once the WAL is past its restart size and this thread has copied all but a
// few frames, the writer copies those few itself (a short passive checkpoint
// on its own connection) and its next transaction restarts the WAL. A writer
// far ahead of this thread (its backstop size) checkpoints inline, as SQLite
// would, so the WAL stays bounded whatever the load.
//
// Thread safety: Hook runs on the writer thread; Pause from the writer
// thread; everything else is internal.
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_CHECKPOINTER_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_CHECKPOINTER_H_

#include <sqlite3.h>

#include <atomic>
#include <condition_variable>
#include <cstdint>
#include <mutex>
#include <thread>

namespace tickmark::ledger {

class Checkpointer {
 public:
  // A background checkpoint is asked for once this many frames wait to be
  // copied (SQLite's default wal_autocheckpoint; SQLite docs: PRAGMA
  // wal_autocheckpoint).
  static constexpr int kBatchFrames = 1000;
  // WAL size (pages, 64 MiB) past which the writer finishes a nearly copied
  // WAL itself ...
  static constexpr int kDefaultRestartPages = 16000;
  // ... when at most this many frames from before its latest commit are left
  // to copy (a few ms at the ~15 µs a page measured here; its own commit's
  // frames are still in the page cache). That finish also syncs the frames
  // written since the thread's last pass, so it is the writer's one stall
  // left (20-35 ms measured here under fanout_bench's load): a large WAL
  // makes it rare (about once a second at that bench's 30k records/s, once
  // in minutes at human rates).
  static constexpr int kInlineFrames = 256;
  // WAL size past which the writer checkpoints inline whatever is left.
  static constexpr int kDefaultBackstopPages = 32000;

  // Takes `db` (a connection of its own to the ledger, in WAL mode) and
  // starts the thread; installs the WAL hook on `writer`.
  Checkpointer(sqlite3* db, sqlite3* writer, int restart_pages = kDefaultRestartPages,
               int backstop_pages = kDefaultBackstopPages);
  // Removes the hook, stops the thread and closes its connection without a
  // checkpoint (the writer's close makes the last one).
  ~Checkpointer();

  // No checkpoint at all while paused (a ledger whose writes fail keeps its
  // WAL intact and spends no disk space on copies). Writer thread.
  void Pause(bool paused);

  // Checkpoint runs so far, and the WAL frames each run copied, summed: by
  // this thread, and by the writer (finishing a WAL before it starts again,
  // or past the backstop).
  uint64_t background_runs() const { return background_runs_.load(); }
  uint64_t writer_runs() const { return inline_runs_.load(); }
  uint64_t background_frames() const { return background_frames_.load(); }
  uint64_t writer_frames() const { return inline_frames_.load(); }

 private:
  static int Hook(void* self, sqlite3* db, const char* name, int pages);
  void OnCommit(sqlite3* writer, int pages);
  void Loop();
  // A run on either side left `total` frames of WAL `generation` copied
  // (sqlite3_wal_checkpoint_v2's pnCkpt): adds its share to `frames`.
  void Copied(uint64_t generation, int total, std::atomic<uint64_t>* frames);  // under mu_

  sqlite3* const db_;      // this thread's connection
  sqlite3* const writer_;  // the writer's connection (for the hook only)
  const int restart_pages_;
  const int backstop_pages_;
  std::atomic<bool> paused_{false};
  std::atomic<bool> running_{false};  // a background checkpoint is in progress
  // The WAL's generation: the writer counts one each time it starts again.
  std::atomic<uint64_t> generation_{0};
  int last_pages_ = 0;  // writer thread only: the WAL's size at the last commit
  std::atomic<uint64_t> background_runs_{0};
  std::atomic<uint64_t> inline_runs_{0};
  std::atomic<uint64_t> background_frames_{0};
  std::atomic<uint64_t> inline_frames_{0};

  std::mutex mu_;
  std::condition_variable cv_;
  bool requested_ = false;  // GUARDED_BY(mu_)
  bool stopping_ = false;   // GUARDED_BY(mu_)
  // Frames of the WAL known to be copied by the latest run on either side,
  // and that WAL's generation.
  int copied_ = 0;                  // GUARDED_BY(mu_)
  uint64_t copied_generation_ = 0;  // GUARDED_BY(mu_)
  std::thread thread_;
};

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_CHECKPOINTER_H_

#include "server/ledger/sqlite/checkpointer.h"

#include <algorithm>

#include "server/base/log.h"

namespace tickmark::ledger {

Checkpointer::Checkpointer(sqlite3* db, sqlite3* writer, int restart_pages, int backstop_pages)
    : db_(db),
      writer_(writer),
      restart_pages_(restart_pages),
      backstop_pages_(std::max(backstop_pages, restart_pages)) {
  // The writer's connection makes the checkpoint on a clean close; this one
  // must not (it may close while writes are failing).
  sqlite3_db_config(db_, SQLITE_DBCONFIG_NO_CKPT_ON_CLOSE, 1, nullptr);
  // Replaces SQLite's automatic checkpoint, which is a WAL hook too (SQLite
  // docs: sqlite3_wal_autocheckpoint).
  sqlite3_wal_hook(writer_, &Checkpointer::Hook, this);
  thread_ = std::thread([this] { Loop(); });
}

Checkpointer::~Checkpointer() {
  TM_LOG(kDebug) << "ledger WAL checkpoints: " << background_runs_.load() << " in the background ("
                 << background_frames_.load() << " frames), " << inline_runs_.load()
                 << " on the writer thread (" << inline_frames_.load() << " frames)";
  sqlite3_wal_hook(writer_, nullptr, nullptr);
  {
    std::lock_guard<std::mutex> lock(mu_);
    stopping_ = true;
  }
  cv_.notify_all();
  if (thread_.joinable()) thread_.join();
  sqlite3_close(db_);
}

void Checkpointer::Pause(bool paused) { paused_.store(paused); }

int Checkpointer::Hook(void* self, sqlite3* db, const char* /*name*/, int pages) {
  static_cast<Checkpointer*>(self)->OnCommit(db, pages);
  return SQLITE_OK;
}

void Checkpointer::OnCommit(sqlite3* writer, int pages) {
  const bool restarted = pages < last_pages_;
  if (restarted) generation_.fetch_add(1);                    // the WAL started again
  const int added = restarted ? pages : pages - last_pages_;  // by this commit
  last_pages_ = pages;
  if (paused_.load()) return;
  const bool running = running_.load();
  int copied = 0;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (copied_generation_ == generation_.load()) copied = copied_;
  }
  const int uncopied = pages - copied;
  // Left over from before this commit: the copy the writer would make beyond
  // re-reading what it just wrote.
  const int behind = uncopied - added;
  if (pages >= backstop_pages_ ||
      (pages >= restart_pages_ && !running && behind <= kInlineFrames)) {
    // SQLITE_BUSY (the thread started meanwhile) only means: not this time.
    int total = 0;
    if (sqlite3_wal_checkpoint_v2(writer, nullptr, SQLITE_CHECKPOINT_PASSIVE, nullptr, &total) ==
        SQLITE_OK) {
      inline_runs_.fetch_add(1);
      std::lock_guard<std::mutex> lock(mu_);
      Copied(generation_.load(), total, &inline_frames_);
    }
    return;
  }
  // Past restart_pages_ the thread runs as often as it can, so that little
  // is left for the writer.
  if (running || uncopied < (pages >= restart_pages_ ? kInlineFrames : kBatchFrames)) return;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (requested_) return;
    requested_ = true;
  }
  cv_.notify_one();
}

void Checkpointer::Loop() {
  std::unique_lock<std::mutex> lock(mu_);
  while (true) {
    cv_.wait(lock, [this] { return requested_ || stopping_; });
    if (stopping_) return;
    requested_ = false;
    running_.store(true);
    lock.unlock();
    int log = 0, copied = 0;
    const uint64_t generation = generation_.load();
    const int rc = paused_.load() ? SQLITE_BUSY  // asked before the pause: nothing to do
                                  : sqlite3_wal_checkpoint_v2(
                                        db_, nullptr, SQLITE_CHECKPOINT_PASSIVE, &log, &copied);
    if (rc == SQLITE_OK) {
      background_runs_.fetch_add(1);
    } else if (rc != SQLITE_BUSY) {
      TM_LOG(kWarning) << "ledger WAL checkpoint failed: " << sqlite3_errmsg(db_)
                       << " (the writer checkpoints inline past " << backstop_pages_ << " pages)";
    }
    lock.lock();
    if (rc == SQLITE_OK) Copied(generation, copied, &background_frames_);
    running_.store(false);
  }
}

void Checkpointer::Copied(uint64_t generation, int total, std::atomic<uint64_t>* frames) {
  if (generation < copied_generation_) return;  // that WAL has started again since
  const int before = generation == copied_generation_ ? copied_ : 0;
  if (total > before) frames->fetch_add(static_cast<uint64_t>(total - before));
  copied_generation_ = generation;
  copied_ = std::max(before, total);
}

}  // namespace tickmark::ledger

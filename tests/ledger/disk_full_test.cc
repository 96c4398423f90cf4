// A full disk is a state with a way out: appends fail promptly with
// RESOURCE_EXHAUSTED (never a hang), WriteHealth says why, the reserve file
// gives room for the ledger's own "write_failing" row, and once space
// returns writes resume by themselves, continuing the chain without a gap.
// (The old ledger refused every write until a restart.)
//
// The full disk is a small tmpfs the test mounts, so DiskFullTest needs root
// (it is skipped, saying so, otherwise). FileSizeLimitTest needs no root: a
// per-file size limit in a forked child makes the writes fail instead.
#include <fcntl.h>
#include <gtest/gtest.h>
#include <sqlite3.h>
#include <sys/mount.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <condition_variable>
#include <csignal>
#include <cstdio>
#include <cstring>
#include <mutex>

#include "tests/ledger/ledger_test_util.h"

namespace tickmark::ledger {
namespace {

using namespace tickmark::ledger::testing;
namespace fs = std::filesystem;

// Rows of ledger_event, read with a connection of our own (as an operator
// would with the sqlite3 CLI).
std::vector<std::string> LedgerEvents(const std::string& path) {
  std::vector<std::string> out;
  sqlite3* db = nullptr;
  if (sqlite3_open_v2(path.c_str(), &db, SQLITE_OPEN_READONLY, nullptr) == SQLITE_OK) {
    sqlite3_stmt* q = nullptr;
    if (sqlite3_prepare_v2(db, "SELECT event FROM ledger_event ORDER BY id", -1, &q, nullptr) ==
        SQLITE_OK) {
      while (sqlite3_step(q) == SQLITE_ROW) {
        out.emplace_back(reinterpret_cast<const char*>(sqlite3_column_text(q, 0)));
      }
    }
    sqlite3_finalize(q);
  }
  sqlite3_close(db);
  return out;
}

class DiskFullTest : public ::testing::Test {
 protected:
  void SetUp() override {
    if (geteuid() != 0) {
      GTEST_SKIP() << "not root: this test mounts a 4 MiB tmpfs to fill it";
    }
    dir_ = MakeTempDir("tm-diskfull");
    if (mount("tmpfs", dir_.c_str(), "tmpfs", 0, "size=4m,mode=0700") != 0) {
      const std::string why = std::strerror(errno);
      std::filesystem::remove_all(dir_);
      dir_.clear();
      GTEST_SKIP() << "cannot mount a tmpfs (" << why << "), so no small disk to fill";
    }
    mounted_ = true;
    options_.path = dir_ + "/t.db";
    options_.reserve_bytes = 256 << 10;
    options_.retry_initial = std::chrono::milliseconds(5);
    options_.retry_max = std::chrono::milliseconds(50);
    options_.on_write_health = [this](const absl::Status& s) {
      std::lock_guard<std::mutex> lock(mu_);
      health_changes_.push_back(s);
      cv_.notify_all();
    };
  }
  void TearDown() override {
    ledger_.reset();
    if (mounted_) umount2(dir_.c_str(), MNT_DETACH);
    if (!dir_.empty()) std::filesystem::remove_all(dir_);
  }

  void Open() {
    auto l = SqliteLedger::Open(options_);
    ASSERT_TRUE(l.ok()) << l.status().message();
    ledger_ = std::move(*l);
  }
  // Takes every free byte of the file system.
  void Fill() {
    const int fd = open((dir_ + "/filler").c_str(), O_CREAT | O_WRONLY | O_CLOEXEC, 0600);
    ASSERT_GE(fd, 0);
    std::string chunk(64 << 10, 'f');
    for (size_t size = chunk.size(); size >= 512; size /= 2) {
      while (write(fd, chunk.data(), size) == static_cast<ssize_t>(size)) {
      }
    }
    close(fd);
  }
  void Unfill() { std::filesystem::remove(dir_ + "/filler"); }
  // Waits (30 s at most) until the health callback reported `ok`.
  bool WaitForHealth(bool ok) {
    std::unique_lock<std::mutex> lock(mu_);
    return cv_.wait_for(lock, std::chrono::seconds(30), [&] {
      return !health_changes_.empty() && health_changes_.back().ok() == ok;
    });
  }
  // Appends 4 KiB markers until one fails; returns that failure.
  absl::Status AppendUntilFailure(uint64_t* committed) {
    for (int i = 0; i < 5000; ++i) {
      Committed c = AppendAndWait(ledger_.get(), "s-a", {MarkerRecord(4096)});
      if (!c.status.ok()) return c.status;
      *committed = c.records.back().sequence();
    }
    return absl::OkStatus();
  }

  std::string dir_;
  bool mounted_ = false;
  SqliteLedger::Options options_;
  std::unique_ptr<SqliteLedger> ledger_;
  std::mutex mu_;
  std::condition_variable cv_;
  std::vector<absl::Status> health_changes_;  // GUARDED_BY(mu_)
};

TEST_F(DiskFullTest, AppendsFailPromptlyThenResumeWhenSpaceReturns) {
  Open();
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  uint64_t committed = 0;
  for (uint64_t i = 1; i <= 5; ++i) {
    Committed c = AppendAndWait(ledger_.get(), "s-a", {FeedbackRecord("c1", i, 1)});
    ASSERT_TRUE(c.status.ok()) << c.status.message();
    committed = c.records.back().sequence();
  }
  ASSERT_TRUE(std::filesystem::exists(dir_ + "/t.db.reserve"));

  Fill();
  absl::Status failure = AppendUntilFailure(&committed);
  ASSERT_EQ(failure.code(), absl::StatusCode::kResourceExhausted) << failure.message();
  EXPECT_NE(failure.message().find("ledger disk full"), absl::string_view::npos)
      << failure.message();
  EXPECT_EQ(ledger_->WriteHealth().code(), absl::StatusCode::kResourceExhausted);
  ASSERT_TRUE(WaitForHealth(false));

  // While full: more appends and a session change get the error at once.
  for (int i = 0; i < 3; ++i) {
    Committed c = AppendAndWait(ledger_.get(), "s-a", {FeedbackRecord("c1", 100 + i, 1)});
    EXPECT_EQ(c.status.code(), absl::StatusCode::kResourceExhausted) << c.status.message();
  }
  EXPECT_EQ(ledger_->CreateSession(Session("s-b")).code(), absl::StatusCode::kResourceExhausted);
  EXPECT_EQ(ledger_->Flush().code(), absl::StatusCode::kResourceExhausted);
  // The reserve was given up, and its space let the ledger note the failure.
  EXPECT_FALSE(std::filesystem::exists(dir_ + "/t.db.reserve"));
  EXPECT_EQ(LedgerEvents(options_.path), std::vector<std::string>{"write_failing"});

  // Space returns: no restart, no call; the writer's retry finds it.
  Unfill();
  ASSERT_TRUE(WaitForHealth(true)) << ledger_->WriteHealth().message();
  EXPECT_TRUE(ledger_->WriteHealth().ok());
  EXPECT_TRUE(std::filesystem::exists(dir_ + "/t.db.reserve"));
  Committed after = AppendAndWait(ledger_.get(), "s-a", {FeedbackRecord("c1", 200, 1)});
  ASSERT_TRUE(after.status.ok()) << after.status.message();
  // The failed appends' sequences were handed back: no gap.
  EXPECT_EQ(after.records[0].sequence(), committed + 1);
  ExpectChainVerifies(ledger_.get(), "s-a", committed + 1);
  EXPECT_EQ(LedgerEvents(options_.path),
            (std::vector<std::string>{"write_failing", "write_resumed"}));

  // A restart finds everything (the side file agrees with the ledger).
  ledger_.reset();
  Open();
  ExpectChainVerifies(ledger_.get(), "s-a", committed + 1);
}

TEST_F(DiskFullTest, ClosesCleanlyWhileTheDiskIsFullAndLosesNothingCommitted) {
  Open();
  ASSERT_TRUE(ledger_->CreateSession(Session("s-a")).ok());
  uint64_t committed = 0;
  for (uint64_t i = 1; i <= 5; ++i) {
    Committed c = AppendAndWait(ledger_.get(), "s-a", {FeedbackRecord("c1", i, 1)});
    ASSERT_TRUE(c.status.ok()) << c.status.message();
    committed = c.records.back().sequence();
  }
  Fill();
  absl::Status failure = AppendUntilFailure(&committed);
  ASSERT_EQ(failure.code(), absl::StatusCode::kResourceExhausted) << failure.message();
  // Queued appends are failed, not left hanging, by Close.
  std::promise<absl::Status> queued;
  ASSERT_TRUE(ledger_
                  ->Append("s-a", {FeedbackRecord("c1", 99, 1)},
                           [&queued](const absl::Status& s, const auto&) { queued.set_value(s); })
                  .ok());
  ledger_->Close();
  auto f = queued.get_future();
  ASSERT_EQ(f.wait_for(std::chrono::seconds(0)), std::future_status::ready);
  EXPECT_FALSE(f.get().ok());
  ledger_.reset();

  Unfill();
  Open();
  ExpectChainVerifies(ledger_.get(), "s-a", committed);
  EXPECT_TRUE(ledger_->WriteHealth().ok());
}

// The same way out without root: a per-file size limit (RLIMIT_FSIZE) in a
// forked child stands in for the full disk, and raising it again for the
// space that returns. The child reports through its exit status (and
// prints its failures).
TEST(FileSizeLimitTest, AppendsFailPromptlyThenResumeWhenTheLimitIsRaised) {
  const std::string dir = MakeTempDir("tm-fsize");
  const pid_t pid = fork();
  ASSERT_GE(pid, 0);
  if (pid == 0) {
    signal(SIGXFSZ, SIG_IGN);  // a write past the limit then fails with EFBIG instead
    std::mutex mu;
    std::condition_variable cv;
    std::vector<absl::Status> changes;
    SqliteLedger::Options o;
    o.path = dir + "/t.db";
    o.reserve_bytes = 0;  // a per-file limit: freeing another file gives nothing back
    o.retry_initial = std::chrono::milliseconds(5);
    o.retry_max = std::chrono::milliseconds(50);
    o.on_write_health = [&](const absl::Status& st) {
      std::lock_guard<std::mutex> lock(mu);
      changes.push_back(st);
      cv.notify_all();
    };
    auto opened = SqliteLedger::Open(o);
    if (!opened.ok()) _exit(10);
    std::unique_ptr<SqliteLedger> ledger = std::move(*opened);
    if (!ledger->CreateSession(Session("s-a")).ok()) _exit(11);
    uint64_t committed = 0;
    for (uint64_t i = 1; i <= 5; ++i) {
      Committed c = AppendAndWait(ledger.get(), "s-a", {FeedbackRecord("c1", i, 1)});
      if (!c.status.ok()) _exit(12);
      committed = c.records.back().sequence();
    }
    rlimit limit{};
    getrlimit(RLIMIT_FSIZE, &limit);
    const rlim_t hard = limit.rlim_max;
    limit.rlim_cur = static_cast<rlim_t>(
        std::max(fs::file_size(o.path), fs::file_size(o.path + "-wal")) + (64 << 10));
    if (setrlimit(RLIMIT_FSIZE, &limit) != 0) _exit(13);
    absl::Status failure;
    for (int i = 0; i < 2000 && failure.ok(); ++i) {
      Committed c = AppendAndWait(ledger.get(), "s-a", {MarkerRecord(4096)});
      failure = c.status;
      if (c.status.ok()) committed = c.records.back().sequence();
    }
    if (failure.ok()) _exit(14);
    std::fprintf(stderr, "append failed as expected: %s\n", std::string(failure.message()).c_str());
    if (ledger->WriteHealth().ok()) _exit(15);
    // Failing appends are answered at once, not held.
    if (AppendAndWait(ledger.get(), "s-a", {FeedbackRecord("c1", 100, 1)}).status.ok()) _exit(16);
    limit.rlim_cur = hard;
    if (setrlimit(RLIMIT_FSIZE, &limit) != 0) _exit(17);
    {
      std::unique_lock<std::mutex> lock(mu);
      if (!cv.wait_for(lock, std::chrono::seconds(30),
                       [&] { return !changes.empty() && changes.back().ok(); })) {
        _exit(18);
      }
    }
    Committed after = AppendAndWait(ledger.get(), "s-a", {FeedbackRecord("c1", 200, 1)});
    if (!after.status.ok() || after.records[0].sequence() != committed + 1) _exit(19);
    ExpectChainVerifies(ledger.get(), "s-a", committed + 1);
    ledger.reset();
    _exit(::testing::Test::HasFailure() ? 20 : 0);
  }
  int status = 0;
  ASSERT_EQ(waitpid(pid, &status, 0), pid);
  std::filesystem::remove_all(dir);
  ASSERT_TRUE(WIFEXITED(status)) << "child ended by signal " << WTERMSIG(status);
  EXPECT_EQ(WEXITSTATUS(status), 0) << "see the child's exit points in the test body";
}

}  // namespace
}  // namespace tickmark::ledger

// tickmarkd killed with SIGKILL while feedback is in flight, then restarted
// on the same data dir. Checks docs/architecture.md §6: "every accepted message is
// written before it is acknowledged ... the default must lose nothing that
// was acknowledged if the server process is killed" and "clients resend
// unacknowledged messages after a reconnect; the server deduplicates by
// (client, client sequence). Exactly-once effect, at-least-once transport."
//
// The server runs as a child process (BIN/tickmarkd from $TICKMARK_BIN); the
// client is the raw gRPC stub (live_stream.h); the ledger is read with the
// SQLite C API, outside the server.
#include <fcntl.h>
#include <poll.h>
#include <signal.h>
#include <spawn.h>
#include <sqlite3.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <cctype>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <map>
#include <random>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include "absl/strings/escaping.h"
#include "gtest/gtest.h"
#include "tests/e2e/live_stream.h"

extern char** environ;

namespace tickmark::e2e {
namespace {

constexpr char kTrainer[] = "ava";
constexpr char kClientId[] = "dock-rover-trainer:kill9";
// Feedback the client keeps unacknowledged at once (pipelining, so that a
// kill lands with messages in flight).
constexpr size_t kWindow = 64;

std::string BinDir() {
  const char* bin = std::getenv("TICKMARK_BIN");
  return bin != nullptr ? bin : TICKMARK_BIN_DIR;
}

std::string ReadFileOrEmpty(const std::string& path) {
  std::ifstream in(path);
  std::stringstream s;
  s << in.rdbuf();
  return s.str();
}

// One tickmarkd child. Killed (SIGKILL) and reaped on destruction.
class ServerProcess {
 public:
  ServerProcess() = default;
  ServerProcess(const ServerProcess&) = delete;
  ServerProcess& operator=(const ServerProcess&) = delete;
  ~ServerProcess() { Kill(); }

  // Starts tickmarkd on `data_dir` at 127.0.0.1:0 (stderr to `log_path`) and
  // waits for its "tickmarkd listening port=N" line.
  bool Start(const std::string& data_dir, const std::string& log_path,
             Clock::time_point deadline, std::string* error) {
    log_path_ = log_path;
    const std::string path = BinDir() + "/tickmarkd";
    int out[2];
    if (pipe2(out, O_CLOEXEC) != 0) {
      *error = "pipe2 failed";
      return false;
    }
    posix_spawn_file_actions_t fa;
    posix_spawn_file_actions_init(&fa);
    posix_spawn_file_actions_adddup2(&fa, out[1], 1);
    posix_spawn_file_actions_addopen(&fa, 2, log_path.c_str(), O_WRONLY | O_CREAT | O_APPEND,
                                     0644);
    posix_spawn_file_actions_addopen(&fa, 0, "/dev/null", O_RDONLY, 0);
    // Scripted trainers send far faster than a human: the rate limit is off.
    std::vector<std::string> args{path, "--data-dir", data_dir, "--listen", "127.0.0.1:0",
                                  "--feedback-rate", "0", "--step-rate", "0"};
    std::vector<char*> argv;
    for (std::string& a : args) argv.push_back(a.data());
    argv.push_back(nullptr);
    const int rc = posix_spawn(&pid_, path.c_str(), &fa, nullptr, argv.data(), environ);
    posix_spawn_file_actions_destroy(&fa);
    close(out[1]);
    if (rc != 0) {
      close(out[0]);
      pid_ = -1;
      *error = "cannot run " + path + ": " + strerror(rc);
      return false;
    }
    out_fd_ = out[0];
    // Polling the child's stdout with a deadline (not sleeping).
    std::string got;
    constexpr std::string_view kPrefix = "tickmarkd listening port=";
    while (true) {
      if (auto p = got.find(kPrefix); p != std::string::npos) {
        if (auto nl = got.find('\n', p); nl != std::string::npos) {
          port_ = std::atoi(got.substr(p + kPrefix.size(), nl - p - kPrefix.size()).c_str());
          if (port_ > 0) return true;
          *error = "bad port line: " + got;
          return false;
        }
      }
      const auto left =
          std::chrono::duration_cast<std::chrono::milliseconds>(deadline - Clock::now()).count();
      if (left <= 0) {
        *error = "no port line before the deadline; stderr:\n" + ReadFileOrEmpty(log_path_);
        return false;
      }
      pollfd p{out_fd_, POLLIN, 0};
      if (poll(&p, 1, static_cast<int>(left)) <= 0) continue;
      char buf[256];
      const ssize_t n = read(out_fd_, buf, sizeof buf);
      if (n <= 0) {
        *error = "tickmarkd exited before listening; stderr:\n" + ReadFileOrEmpty(log_path_);
        return false;
      }
      got.append(buf, static_cast<size_t>(n));
    }
  }

  int port() const { return port_; }
  pid_t pid() const { return pid_; }
  std::string target() const { return "127.0.0.1:" + std::to_string(port_); }
  std::string log() const { return ReadFileOrEmpty(log_path_); }

  // SIGKILL and reap. Idempotent.
  void Kill() {
    if (pid_ > 0) {
      kill(pid_, SIGKILL);
      Reap();
    }
  }

  // Reaps a child that was killed (e.g. by the ack callback).
  int Reap() {
    int status = 0;
    if (pid_ > 0) waitpid(pid_, &status, 0);
    pid_ = -1;
    if (out_fd_ >= 0) close(out_fd_);
    out_fd_ = -1;
    return status;
  }

  // SIGTERM, then waits (until the deadline) for the child to close its
  // stdout, which it does only by exiting. Returns the wait status, or
  // nullopt (after a SIGKILL) if it did not exit in time.
  std::optional<int> Terminate(Clock::time_point deadline) {
    if (pid_ <= 0) return std::nullopt;
    kill(pid_, SIGTERM);
    while (true) {
      const auto left =
          std::chrono::duration_cast<std::chrono::milliseconds>(deadline - Clock::now()).count();
      if (left <= 0) {
        Kill();
        return std::nullopt;
      }
      pollfd p{out_fd_, POLLIN, 0};
      if (poll(&p, 1, static_cast<int>(left)) <= 0) continue;
      char buf[256];
      if (read(out_fd_, buf, sizeof buf) <= 0) return Reap();  // EOF: it exited
    }
  }

 private:
  pid_t pid_ = -1;
  int out_fd_ = -1;
  int port_ = 0;
  std::string log_path_;
};

// A read of the ledger file with the SQLite C API, outside the server.
class LedgerReader {
 public:
  explicit LedgerReader(const std::string& path) {
    // Read-write without create: a WAL database needs its -shm file.
    if (sqlite3_open_v2(path.c_str(), &db_, SQLITE_OPEN_READWRITE, nullptr) != SQLITE_OK) {
      ADD_FAILURE() << "cannot open " << path << ": " << sqlite3_errmsg(db_);
    }
    sqlite3_busy_timeout(db_, 5000);
  }
  ~LedgerReader() { sqlite3_close(db_); }

  // Rows of `sql` with `?` bound to `binds` (text), every column as text.
  std::vector<std::vector<std::string>> Query(const std::string& sql,
                                              const std::vector<std::string>& binds = {}) {
    std::vector<std::vector<std::string>> rows;
    sqlite3_stmt* stmt = nullptr;
    if (sqlite3_prepare_v2(db_, sql.c_str(), -1, &stmt, nullptr) != SQLITE_OK) {
      ADD_FAILURE() << sql << ": " << sqlite3_errmsg(db_);
      return rows;
    }
    for (size_t i = 0; i < binds.size(); ++i) {
      sqlite3_bind_text(stmt, static_cast<int>(i + 1), binds[i].c_str(), -1, SQLITE_TRANSIENT);
    }
    int rc;
    while ((rc = sqlite3_step(stmt)) == SQLITE_ROW) {
      std::vector<std::string> row;
      for (int c = 0; c < sqlite3_column_count(stmt); ++c) {
        const unsigned char* t = sqlite3_column_text(stmt, c);
        row.emplace_back(t ? reinterpret_cast<const char*>(t) : "NULL");
      }
      rows.push_back(std::move(row));
    }
    if (rc != SQLITE_DONE) ADD_FAILURE() << sql << ": " << sqlite3_errmsg(db_);
    sqlite3_finalize(stmt);
    return rows;
  }

  // client_seq -> every session seq stored for it (a list, so a duplicate
  // row would show).
  std::map<uint64_t, std::vector<uint64_t>> FeedbackOf(const std::string& session,
                                                       const std::string& client) {
    std::map<uint64_t, std::vector<uint64_t>> out;
    for (const auto& row : Query("SELECT client_seq, seq FROM feedback WHERE session_id = ? AND "
                                 "client_id = ? ORDER BY seq",
                                 {session, client})) {
      out[std::stoull(row[0])].push_back(std::stoull(row[1]));
    }
    return out;
  }

 private:
  sqlite3* db_ = nullptr;
};

// Checks every ledger-wide invariant a crash must not break.
void ExpectLedgerSound(LedgerReader& db, const std::string& session) {
  const auto integrity = db.Query("PRAGMA integrity_check");
  ASSERT_EQ(integrity.size(), 1u);
  EXPECT_EQ(integrity[0][0], "ok");  // SQLite documentation, PRAGMA integrity_check
  // docs/architecture.md §6: one sequence per session, no gaps (starts at 1).
  const auto seqs = db.Query(
      "SELECT COUNT(*), COALESCE(MIN(seq), 0), COALESCE(MAX(seq), 0) FROM record WHERE "
      "session_id = ?",
      {session});
  ASSERT_EQ(seqs.size(), 1u);
  EXPECT_EQ(seqs[0][1], "1");
  EXPECT_EQ(seqs[0][0], seqs[0][2]) << "gap in the record sequence";
  // Journal and typed table agree on the feedback.
  const auto both = db.Query(
      "SELECT (SELECT COUNT(*) FROM record WHERE session_id = ?1 AND kind = 'feedback'), "
      "(SELECT COUNT(*) FROM feedback WHERE session_id = ?1)",
      {session});
  ASSERT_EQ(both.size(), 1u);
  EXPECT_EQ(both[0][0], both[0][1]);
}

// The hash chain across the crash and restart (ledger.h, docs/architecture.md §6:
// hash = SHA-256(previous hash || body), the first from 32 zero bytes),
// recomputed with coreutils' sha256sum: one file per record under `scratch`.
void ExpectChainVerifies(LedgerReader& db, const std::string& session,
                         const std::string& scratch) {
  const auto chain = db.Query(
      "SELECT seq, hex(body), hex(hash) FROM record WHERE session_id = ? ORDER BY seq", {session});
  ASSERT_FALSE(chain.empty());
  std::filesystem::create_directories(scratch);
  const std::string list = scratch + "/files";
  std::ofstream names(list);
  std::string prev(32, '\0');
  for (size_t i = 0; i < chain.size(); ++i) {
    const std::string path = scratch + "/" + chain[i][0];
    std::ofstream out(path, std::ios::binary);
    const std::string body = absl::HexStringToBytes(chain[i][1]);
    out.write(prev.data(), static_cast<std::streamsize>(prev.size()));
    out.write(body.data(), static_cast<std::streamsize>(body.size()));
    ASSERT_TRUE(out.good());
    names << path << '\0';
    prev = absl::HexStringToBytes(chain[i][2]);
  }
  names.close();
  // outside hash: coreutils sha256sum (FIPS 180-4 SHA-256)
  const std::string cmd = "xargs -0 sha256sum < '" + list + "'";
  FILE* p = popen(cmd.c_str(), "r");
  ASSERT_NE(p, nullptr);
  char line[512];
  size_t n = 0;
  while (fgets(line, sizeof line, p) != nullptr) {
    ASSERT_LT(n, chain.size());
    std::string digest(line, 64);
    for (char& c : digest) c = static_cast<char>(std::toupper(static_cast<unsigned char>(c)));
    EXPECT_EQ(digest, chain[n][2]) << "hash of record " << chain[n][0];
    ++n;
  }
  EXPECT_EQ(pclose(p), 0);
  EXPECT_EQ(n, chain.size());
}

// One trainer client of the test: its id, its stream of the first life and
// what it saw.
struct Trainer {
  std::string client_id;
  std::unique_ptr<TrainerStream> stream;
  std::atomic<uint64_t> attempted{0};  // highest client sequence written (or tried)
  std::map<uint64_t, uint64_t> acked;  // client seq -> session seq, first life
  std::map<uint64_t, std::vector<uint64_t>> stored;  // after the restart
  uint64_t committed_high = 0;         // highest client sequence the ledger kept
  // Client seq -> the message first sent: a resend carries the same bytes
  // (a reused client sequence with other content is refused).
  std::map<uint64_t, v1::TrainerMessage> sent;  // written by its sender thread only
};

struct KillPoint {
  uint64_t seed;
  int trainers;  // concurrent trainer streams (own client ids, one token)
};

// For test names and listings (gtest would dump the struct's bytes).
void PrintTo(const KillPoint& k, std::ostream* os) {
  *os << "seed " << k.seed << ", " << k.trainers << " trainer(s)";
}

class Kill9Test : public ::testing::TestWithParam<KillPoint> {
 protected:
  void SetUp() override {
    std::string tmpl = (std::filesystem::temp_directory_path() / "tickmark-kill9-XXXXXX").string();
    ASSERT_NE(mkdtemp(tmpl.data()), nullptr);
    root_ = tmpl;
    data_dir_ = root_ + "/data";
  }
  void TearDown() override {
    server_.reset();  // kills and reaps any child
    std::error_code ec;
    std::filesystem::remove_all(root_, ec);
  }

  std::unique_ptr<ServerProcess> StartServer(int n) {
    auto p = std::make_unique<ServerProcess>();
    std::string error;
    if (!p->Start(data_dir_, root_ + "/tickmarkd-" + std::to_string(n) + ".log",
                  Clock::now() + std::chrono::seconds(15), &error)) {
      ADD_FAILURE() << error;
      return nullptr;
    }
    return p;
  }

  // A channel of its own (distinct arguments keep gRPC from sharing one
  // connection between trainers).
  std::shared_ptr<grpc::Channel> Connect(const ServerProcess& p, int n = 0) {
    grpc::ChannelArguments args;
    args.SetInt("tickmark.e2e.trainer", n);
    auto ch = grpc::CreateCustomChannel(p.target(), grpc::InsecureChannelCredentials(), args);
    EXPECT_TRUE(ch->WaitForConnected(std::chrono::system_clock::now() + std::chrono::seconds(10)));
    return ch;
  }

  std::string root_;
  std::string data_dir_;
  std::unique_ptr<ServerProcess> server_;
};

TEST_P(Kill9Test, AcknowledgedFeedbackSurvivesAndResendIsDeduplicated) {
  uint64_t seed = GetParam().seed;
  if (const char* s = std::getenv("TICKMARK_E2E_SEED")) seed ^= std::stoull(s);
  std::mt19937_64 rng(seed);
  const size_t kill_after = std::uniform_int_distribution<size_t>(50, 400)(rng);
  RecordProperty("seed", std::to_string(seed));
  RecordProperty("kill_after_acks", std::to_string(kill_after));
  SCOPED_TRACE("seed " + std::to_string(seed) + ", " + std::to_string(GetParam().trainers) +
               " trainer(s), SIGKILL after " + std::to_string(kill_after) + " acks");

  // 1. First server: a session, a trainer token.
  server_ = StartServer(1);
  ASSERT_NE(server_, nullptr);
  const std::string operator_token = [&] {
    std::string t = ReadFileOrEmpty(data_dir_ + "/operator.token");
    while (!t.empty() && (t.back() == '\n' || t.back() == ' ')) t.pop_back();
    return t;
  }();
  ASSERT_FALSE(operator_token.empty());
  SessionWithToken session;
  {
    auto admin = v1::SessionAdmin::NewStub(Connect(*server_));
    grpc::Status s = CreateSessionWithToken(admin.get(), operator_token, "dock rover, kill -9",
                                            v1::ROLE_TRAINER, kTrainer, &session);
    ASSERT_TRUE(s.ok()) << s.error_message();
  }

  // 2. Stream feedback, pipelined; SIGKILL from an ack callback once
  // `kill_after` acks (over all trainers) are in, while later feedback is
  // still in flight.
  const pid_t victim = server_->pid();
  std::atomic<size_t> acked_count{0};
  std::vector<std::unique_ptr<Trainer>> trainers;
  for (int t = 0; t < GetParam().trainers; ++t) {
    auto tr = std::make_unique<Trainer>();
    tr->client_id = std::string(kClientId) + ":" + std::to_string(t);
    tr->stream = std::make_unique<TrainerStream>(Connect(*server_, t), [&](const v1::Ack&) {
      if (acked_count.fetch_add(1) + 1 == kill_after) kill(victim, SIGKILL);
    });
    auto welcome =
        tr->stream->Hello(session.token, tr->client_id, Clock::now() + std::chrono::seconds(10));
    ASSERT_TRUE(welcome.has_value()) << tr->stream->Finish().error_message();
    EXPECT_EQ(welcome->last_client_sequence(), 0u);
    trainers.push_back(std::move(tr));
  }
  {
    const auto deadline = Clock::now() + std::chrono::seconds(20);
    std::vector<std::thread> senders;
    for (auto& tr : trainers) {
      senders.emplace_back([&, t = tr.get()] {
        const uint64_t cap = kill_after + 5000;  // the kill must come long before this
        for (uint64_t seq = 1; seq <= cap; ++seq) {
          const bool room = t->stream->WaitFor(
              [&](const TrainerStream::State& st) {
                return st.ended || t->attempted.load() - st.acks.size() < kWindow;
              },
              deadline);
          if (!room) {
            ADD_FAILURE() << t->client_id << ": no ack progress before the deadline";
            return;
          }
          if (t->stream->Snapshot().ended) return;
          t->attempted = seq;
          const v1::TrainerMessage m = Feedback(seq, seq % 2 == 0 ? 1.0 : -1.0);
          t->sent[seq] = m;
          if (!t->stream->Send(m)) return;
        }
      });
    }
    for (auto& th : senders) th.join();
    for (auto& tr : trainers) {
      ASSERT_TRUE(
          tr->stream->WaitFor([](const TrainerStream::State& st) { return st.ended; }, deadline))
          << "the stream outlived the kill";
      EXPECT_FALSE(tr->stream->Finish().ok());
      for (const v1::Ack& a : tr->stream->Snapshot().acks) {
        ASSERT_EQ(a.code(), 0) << a.message();
        EXPECT_FALSE(a.duplicate());
        EXPECT_TRUE(tr->acked.emplace(a.client_sequence(), a.sequence()).second)
            << "client sequence " << a.client_sequence() << " acknowledged twice";
      }
      tr->stream.reset();
    }
  }
  if (acked_count.load() < kill_after) {
    FAIL() << "the streams ended after " << acked_count.load() << " acks, before the kill; "
           << "server log:\n" << server_->log();
  }
  const int status = server_->Reap();
  ASSERT_TRUE(WIFSIGNALED(status) && WTERMSIG(status) == SIGKILL) << "status " << status;
  size_t total_acked = 0;
  for (const auto& tr : trainers) {
    total_acked += tr->acked.size();
    RecordProperty("attempted_" + tr->client_id, std::to_string(tr->attempted.load()));
    RecordProperty("acked_" + tr->client_id, std::to_string(tr->acked.size()));
  }
  ASSERT_GE(total_acked, kill_after);

  // 3. Restart on the same data dir; read the ledger from outside.
  server_ = StartServer(2);
  ASSERT_NE(server_, nullptr);
  const std::string db_path = data_dir_ + "/tickmark.db";
  {
    LedgerReader db(db_path);
    ExpectLedgerSound(db, session.session_id);
    ExpectChainVerifies(db, session.session_id, root_ + "/chain-1");
    for (auto& tr : trainers) {
      SCOPED_TRACE(tr->client_id);
      tr->stored = db.FeedbackOf(session.session_id, tr->client_id);
      for (const auto& [cseq, seq] : tr->acked) {
        auto it = tr->stored.find(cseq);
        ASSERT_NE(it, tr->stored.end()) << "acknowledged feedback " << cseq << " lost";
        ASSERT_EQ(it->second.size(), 1u) << "feedback " << cseq << " stored more than once";
        EXPECT_EQ(it->second[0], seq) << "feedback " << cseq << " at another sequence than acked";
      }
      // One stream, committed in order: what survived is a prefix 1..M.
      tr->committed_high = tr->stored.empty() ? 0 : tr->stored.rbegin()->first;
      EXPECT_EQ(tr->stored.size(), tr->committed_high);
      EXPECT_LE(tr->committed_high, tr->attempted.load());
    }
    const auto names = db.Query("SELECT DISTINCT trainer FROM feedback WHERE session_id = ?",
                                {session.session_id});
    ASSERT_EQ(names.size(), 1u);
    EXPECT_EQ(names[0][0], kTrainer);
  }

  // 4. Reconnect with the same client ids; resend everything unacknowledged
  // and a few acknowledged ones.
  for (auto& tr : trainers) {
    SCOPED_TRACE(tr->client_id);
    std::vector<uint64_t> resend;
    for (uint64_t cseq = 1; cseq <= tr->attempted.load(); ++cseq) {
      if (!tr->acked.count(cseq)) resend.push_back(cseq);
    }
    std::vector<uint64_t> acked_keys;
    for (const auto& [cseq, seq] : tr->acked) acked_keys.push_back(cseq);
    std::shuffle(acked_keys.begin(), acked_keys.end(), rng);
    acked_keys.resize(std::min<size_t>(5, acked_keys.size()));
    resend.insert(resend.end(), acked_keys.begin(), acked_keys.end());
    std::sort(resend.begin(), resend.end());

    TrainerStream stream(Connect(*server_));
    auto welcome =
        stream.Hello(session.token, tr->client_id, Clock::now() + std::chrono::seconds(10));
    ASSERT_TRUE(welcome.has_value()) << stream.Finish().error_message();
    EXPECT_EQ(welcome->last_client_sequence(), tr->committed_high);  // stream.proto Welcome
    for (uint64_t cseq : resend) {
      auto first = tr->sent.find(cseq);
      ASSERT_TRUE(stream.Send(first != tr->sent.end() ? first->second
                                                      : Feedback(cseq, cseq % 2 == 0 ? 1.0 : -1.0)));
    }
    ASSERT_TRUE(stream.WaitFor(
        [&](const TrainerStream::State& st) { return st.ended || st.acks.size() >= resend.size(); },
        Clock::now() + std::chrono::seconds(20)))
        << "resends not all acknowledged";
    const grpc::Status end = stream.Finish();
    EXPECT_TRUE(end.ok()) << end.error_message();
    const auto acks = stream.Snapshot().acks;
    ASSERT_EQ(acks.size(), resend.size());
    std::set<uint64_t> seen;
    for (const v1::Ack& a : acks) {
      const uint64_t cseq = a.client_sequence();
      ASSERT_EQ(a.code(), 0) << a.message();
      EXPECT_TRUE(seen.insert(cseq).second) << cseq << " acknowledged twice";
      if (cseq <= tr->committed_high) {
        // Stored before the kill (acknowledged or not): a duplicate of the
        // original, named by its session sequence.
        EXPECT_TRUE(a.duplicate()) << cseq;
        EXPECT_EQ(a.sequence(), tr->stored.at(cseq).at(0)) << cseq;
      } else {
        EXPECT_FALSE(a.duplicate()) << cseq;
      }
      if (auto it = tr->acked.find(cseq); it != tr->acked.end()) {
        EXPECT_EQ(a.sequence(), it->second);
      }
    }
  }

  // 5. Every distinct sequence sent is stored exactly once; the chain still
  // verifies across the crash.
  {
    LedgerReader db(db_path);
    ExpectLedgerSound(db, session.session_id);
    ExpectChainVerifies(db, session.session_id, root_ + "/chain-2");
    for (auto& tr : trainers) {
      SCOPED_TRACE(tr->client_id);
      const auto final_rows = db.FeedbackOf(session.session_id, tr->client_id);
      EXPECT_EQ(final_rows.size(), tr->attempted.load());
      for (const auto& [cseq, seqs] : final_rows) {
        EXPECT_EQ(seqs.size(), 1u) << "feedback " << cseq << " stored more than once";
      }
      if (!final_rows.empty()) {
        EXPECT_EQ(final_rows.rbegin()->first, tr->attempted.load());
      }
    }
  }

  // 6. A clean stop still works on the recovered ledger.
  const auto exit_status = server_->Terminate(Clock::now() + std::chrono::seconds(15));
  ASSERT_TRUE(exit_status.has_value()) << "tickmarkd did not stop on SIGTERM";
  EXPECT_TRUE(WIFEXITED(*exit_status) && WEXITSTATUS(*exit_status) == 0) << server_->log();
}

std::string KillPointName(const ::testing::TestParamInfo<KillPoint>& info) {
  return "seed" + std::to_string(info.param.seed) + "_trainers" +
         std::to_string(info.param.trainers);
}

// Seeds for the kill points; TICKMARK_E2E_SEED=N varies them all.
INSTANTIATE_TEST_SUITE_P(KillPoints, Kill9Test,
                         ::testing::Values(KillPoint{7, 1}, KillPoint{1009, 1},
                                           KillPoint{65537, 1}, KillPoint{31337, 2},
                                           KillPoint{4242, 3}, KillPoint{90001, 3}),
                         KillPointName);

}  // namespace
}  // namespace tickmark::e2e

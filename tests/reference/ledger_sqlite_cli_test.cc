// The ledger as an outside reader sees it: known feedback, steps and a marker
// go through a real server (in process, 127.0.0.1:0); after it shuts down,
// the SQLite file is read with Debian's sqlite3 CLI and the hash chain is
// recomputed with coreutils' sha256sum, neither of which shares code with
// the server. (Built by tests/e2e/CMakeLists.txt: it needs tickmark::rpc.)
#include <fcntl.h>
#include <spawn.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <chrono>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

#include "absl/strings/escaping.h"
#include "gtest/gtest.h"
#include "server/rpc/server.h"
#include "tests/e2e/live_stream.h"

extern char** environ;

namespace tickmark::e2e {
namespace {

using Rows = std::vector<std::vector<std::string>>;

constexpr char kTitle[] = "dock rover, pilot 3";  // a comma, to exercise CSV quoting
constexpr char kCliTrainer[] = "ava";
constexpr char kAgent[] = "dock-rover";
constexpr char kTrainerClient[] = "keys:ava:1";
constexpr char kAgentClient[] = "rover:1";

// Runs argv[0] (found on PATH) and returns its stdout; exit status in *code.
std::string RunCapture(const std::vector<std::string>& args, int* code) {
  int out[2];
  if (pipe2(out, O_CLOEXEC) != 0) return {};
  posix_spawn_file_actions_t fa;
  posix_spawn_file_actions_init(&fa);
  posix_spawn_file_actions_adddup2(&fa, out[1], 1);
  posix_spawn_file_actions_addopen(&fa, 0, "/dev/null", O_RDONLY, 0);
  std::vector<std::string> store = args;
  std::vector<char*> argv;
  for (std::string& a : store) argv.push_back(a.data());
  argv.push_back(nullptr);
  pid_t pid = 0;
  const int rc = posix_spawnp(&pid, argv[0], &fa, nullptr, argv.data(), environ);
  posix_spawn_file_actions_destroy(&fa);
  close(out[1]);
  std::string s;
  if (rc == 0) {
    char buf[4096];
    ssize_t n;
    while ((n = read(out[0], buf, sizeof buf)) > 0) s.append(buf, static_cast<size_t>(n));
    int status = 0;
    waitpid(pid, &status, 0);
    *code = WIFEXITED(status) ? WEXITSTATUS(status) : 128 + WTERMSIG(status);
  } else {
    *code = 127;
  }
  close(out[0]);
  return s;
}

// RFC 4180 CSV, as `sqlite3 -csv` writes it (quoted fields may hold commas,
// doubled quotes and line breaks; records end in \r\n or \n).
Rows ParseCsv(const std::string& text) {
  Rows rows;
  std::vector<std::string> row;
  std::string field;
  bool quoted = false, any = false;
  for (size_t i = 0; i < text.size(); ++i) {
    const char c = text[i];
    if (quoted) {
      if (c == '"' && i + 1 < text.size() && text[i + 1] == '"') {
        field += '"';
        ++i;
      } else if (c == '"') {
        quoted = false;
      } else {
        field += c;
      }
      continue;
    }
    if (c == '"') {
      quoted = any = true;
    } else if (c == ',') {
      row.push_back(std::move(field));
      field.clear();
    } else if (c == '\n' || c == '\r') {
      if (c == '\r' && i + 1 < text.size() && text[i + 1] == '\n') ++i;
      row.push_back(std::move(field));
      field.clear();
      rows.push_back(std::move(row));
      row.clear();
      any = false;
    } else {
      field += c;
      any = true;
    }
  }
  if (any || !field.empty() || !row.empty()) {
    row.push_back(std::move(field));
    rows.push_back(std::move(row));
  }
  return rows;
}

// outside reader: Debian sqlite3 CLI 3.40
Rows Sqlite(const std::string& db, const std::string& sql) {
  int code = -1;
  const std::string out = RunCapture({"sqlite3", "-batch", "-csv", db, sql}, &code);
  EXPECT_EQ(code, 0) << "sqlite3 failed on: " << sql;
  return ParseCsv(out);
}

std::string Upper(std::string s) {
  for (char& c : s) c = static_cast<char>(std::toupper(static_cast<unsigned char>(c)));
  return s;
}

class LedgerSqliteCliTest : public ::testing::Test {
 protected:
  void SetUp() override {
    std::string tmpl = (std::filesystem::temp_directory_path() / "tickmark-cli-XXXXXX").string();
    ASSERT_NE(mkdtemp(tmpl.data()), nullptr);
    dir_ = tmpl;
  }
  void TearDown() override {
    std::error_code ec;
    std::filesystem::remove_all(dir_, ec);
  }
  std::string dir_;
};

TEST_F(LedgerSqliteCliTest, OutsideReaderSeesWhatWasSent) {
  const std::vector<double> values = {1.0, -1.0, 0.5, -0.25, 1.0};
  const std::vector<std::string> inputs = {"key:g", "key:b", "key:g", "pedal:left", "key:g"};
  const std::vector<std::string> actions = {"north", "east", "north", "wait"};
  std::string session_id, db_path;
  std::vector<v1::Ack> feedback_acks, step_acks;
  uint64_t marker_sequence = 0;
  {
    rpc::ServerOptions options;
    options.listen = "127.0.0.1:0";
    options.data_dir = dir_ + "/data";
    auto server = rpc::TickmarkServer::Start(options);
    ASSERT_TRUE(server.ok()) << server.status().message();
    db_path = (*server)->ledger_path();
    std::string operator_token;
    {
      std::ifstream in((*server)->operator_token_path());
      std::getline(in, operator_token);
    }
    auto channel = grpc::CreateChannel("127.0.0.1:" + std::to_string((*server)->port()),
                                       grpc::InsecureChannelCredentials());
    auto admin = v1::SessionAdmin::NewStub(channel);
    SessionWithToken trainer;
    ASSERT_TRUE(CreateSessionWithToken(admin.get(), operator_token, kTitle, v1::ROLE_TRAINER,
                                       kCliTrainer, &trainer)
                    .ok());
    session_id = trainer.session_id;
    std::string agent_token;
    {
      v1::IssueTokenRequest req;
      req.set_session_id(session_id);
      req.set_role(v1::ROLE_AGENT);
      req.set_subject(kAgent);
      v1::IssueTokenResponse resp;
      ASSERT_TRUE(admin->IssueToken(AuthContext(trainer.admin_secret).get(), req, &resp).ok());
      agent_token = resp.secret();
    }
    const auto deadline = Clock::now() + std::chrono::seconds(20);

    // Steps first, so the feedback after them has steps in reach.
    {
      AgentStream agent(channel);
      ASSERT_TRUE(agent.Hello(agent_token, kAgentClient, deadline).has_value());
      const int64_t t0 = MonotonicNanos();
      for (size_t i = 0; i < actions.size(); ++i) {
        v1::AgentMessage m;
        v1::StepMessage* s = m.mutable_step();
        s->set_client_sequence(i + 1);
        s->set_step_id(100 + i);
        s->set_episode(1);
        s->set_start_agent_ns(t0 + static_cast<int64_t>(i) * 100'000'000);
        s->set_action(actions[i]);
        s->set_state("cell:" + std::to_string(i));
        ASSERT_TRUE(agent.Send(m));
      }
      ASSERT_TRUE(agent.WaitFor(
          [&](const AgentStream::State& st) { return st.acks.size() >= actions.size(); },
          deadline));
      EXPECT_TRUE(agent.Finish().ok());
      step_acks = agent.Snapshot().acks;
    }
    {
      TrainerStream stream(channel);
      ASSERT_TRUE(stream.Hello(trainer.token, kTrainerClient, deadline).has_value());
      for (size_t i = 0; i < values.size(); ++i) {
        ASSERT_TRUE(stream.Send(Feedback(i + 1, values[i], inputs[i])));
      }
      ASSERT_TRUE(stream.WaitFor(
          [&](const TrainerStream::State& st) { return st.acks.size() >= values.size(); },
          deadline));
      EXPECT_TRUE(stream.Finish().ok());
      feedback_acks = stream.Snapshot().acks;
    }
    {
      v1::AddMarkerRequest req;
      req.set_session_id(session_id);
      req.set_text("block 2 starts");
      v1::AddMarkerResponse resp;
      ASSERT_TRUE(admin->AddMarker(AuthContext(trainer.admin_secret).get(), req, &resp).ok());
      marker_sequence = resp.sequence();
    }
    (*server)->Shutdown(Duration::Seconds(2));
  }
  ASSERT_EQ(feedback_acks.size(), values.size());
  ASSERT_EQ(step_acks.size(), actions.size());

  // The file as SQLite itself judges it.
  EXPECT_EQ(Sqlite(db_path, "PRAGMA integrity_check"), Rows({{"ok"}}));  // PRAGMA integrity_check
  EXPECT_EQ(Sqlite(db_path, "PRAGMA journal_mode"), Rows({{"wal"}}));    // docs/architecture.md §3: WAL

  EXPECT_EQ(Sqlite(db_path, "SELECT id, title, state FROM session"),
            Rows({{session_id, kTitle, "open"}}));

  const Rows fb = Sqlite(db_path,
                         "SELECT session_id, client_id, client_seq, trainer, value, input, seq "
                         "FROM feedback ORDER BY seq");
  ASSERT_EQ(fb.size(), values.size());
  for (size_t i = 0; i < fb.size(); ++i) {
    SCOPED_TRACE("feedback " + std::to_string(i + 1));
    ASSERT_EQ(fb[i].size(), 7u);
    EXPECT_EQ(fb[i][0], session_id);
    EXPECT_EQ(fb[i][1], kTrainerClient);
    EXPECT_EQ(fb[i][2], std::to_string(i + 1));
    EXPECT_EQ(fb[i][3], kCliTrainer);                // the pseudonym from the token
    EXPECT_EQ(std::stod(fb[i][4]), values[i]);   // exact in binary: ±1, 0.5, -0.25
    EXPECT_EQ(fb[i][5], inputs[i]);
    EXPECT_EQ(fb[i][6], std::to_string(feedback_acks[i].sequence()));  // the acked sequence
  }

  const Rows steps = Sqlite(db_path,
                            "SELECT session_id, client_id, client_seq, agent, step_id, episode, "
                            "action, CAST(state AS TEXT), seq FROM step ORDER BY seq");
  ASSERT_EQ(steps.size(), actions.size());
  for (size_t i = 0; i < steps.size(); ++i) {
    SCOPED_TRACE("step " + std::to_string(i + 1));
    ASSERT_EQ(steps[i].size(), 9u);
    EXPECT_EQ(steps[i][0], session_id);
    EXPECT_EQ(steps[i][1], kAgentClient);
    EXPECT_EQ(steps[i][2], std::to_string(i + 1));
    EXPECT_EQ(steps[i][3], kAgent);
    EXPECT_EQ(steps[i][4], std::to_string(100 + i));
    EXPECT_EQ(steps[i][5], "1");
    EXPECT_EQ(steps[i][6], actions[i]);
    EXPECT_EQ(steps[i][7], "cell:" + std::to_string(i));
    EXPECT_EQ(steps[i][8], std::to_string(step_acks[i].sequence()));
  }

  const Rows markers = Sqlite(db_path, "SELECT session_id, seq, text FROM marker");
  EXPECT_EQ(markers, Rows({{session_id, std::to_string(marker_sequence), "block 2 starts"}}));

  // The journal: one row per record, kinds matching the typed tables.
  EXPECT_EQ(Sqlite(db_path,
                   "SELECT kind, COUNT(*) FROM record WHERE kind IN ('feedback', 'step', "
                   "'marker') GROUP BY kind ORDER BY kind"),
            Rows({{"feedback", std::to_string(values.size())},
                  {"marker", "1"},
                  {"step", std::to_string(actions.size())}}));

  // Hash chain (ledger.h, docs/architecture.md §6): hash = SHA-256(previous hash || body),
  // the first chaining from 32 zero bytes; sequences 1, 2, 3, ... with no gap.
  const Rows chain = Sqlite(db_path,
                            "SELECT seq, hex(body), hex(hash) FROM record WHERE session_id = '" +
                                session_id + "' ORDER BY seq");
  ASSERT_GT(chain.size(), values.size() + actions.size());
  std::vector<std::string> args = {"sha256sum"};
  std::string prev(32, '\0');
  for (size_t i = 0; i < chain.size(); ++i) {
    ASSERT_EQ(chain[i].size(), 3u);
    ASSERT_EQ(chain[i][0], std::to_string(i + 1)) << "gap or disorder in the sequence";
    const std::string path = dir_ + "/chain-" + std::to_string(i + 1);
    std::ofstream out(path, std::ios::binary);
    const std::string body = absl::HexStringToBytes(chain[i][1]);
    out.write(prev.data(), static_cast<std::streamsize>(prev.size()));
    out.write(body.data(), static_cast<std::streamsize>(body.size()));
    ASSERT_TRUE(out.good());
    args.push_back(path);
    prev = absl::HexStringToBytes(chain[i][2]);
  }
  int code = -1;
  // outside hash: coreutils sha256sum (FIPS 180-4 SHA-256)
  const std::string sums = RunCapture(args, &code);
  ASSERT_EQ(code, 0);
  std::istringstream lines(sums);
  std::string line;
  size_t n = 0;
  while (std::getline(lines, line)) {
    ASSERT_LT(n, chain.size());
    EXPECT_EQ(Upper(line.substr(0, 64)), chain[n][2]) << "hash of record " << n + 1;
    ++n;
  }
  EXPECT_EQ(n, chain.size());
}

}  // namespace
}  // namespace tickmark::e2e

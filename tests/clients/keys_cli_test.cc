// tickmark-keys --stdin-lines end to end against FakeLive: the program is
// run as a child process (from $TICKMARK_BIN) with lines on a pipe.
#include <fcntl.h>
#include <signal.h>
#include <spawn.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cstdlib>
#include <string>
#include <vector>

#include "gtest/gtest.h"
#include "tests/clients/fake_live.h"

extern char** environ;

namespace tickmark::keys {
namespace {

using tickmark::testing::FakeLive;

struct Result {
  int exit_code = -1;
  std::string out;
  std::string err;
};

std::string ReadAll(int fd) {
  std::string s;
  char buf[4096];
  ssize_t n;
  while ((n = read(fd, buf, sizeof buf)) > 0) s.append(buf, static_cast<size_t>(n));
  return s;
}

// Runs tickmark-keys with `args`, writes `input` to its stdin and closes it.
// Output is small, so reading stdout then stderr after the write cannot block.
Result RunKeys(const std::vector<std::string>& args, const std::string& input) {
  // Built next to this test (CMake passes its path); $TICKMARK_BIN overrides.
  const char* bin = std::getenv("TICKMARK_BIN");
  const std::string path =
      bin != nullptr ? std::string(bin) + "/tickmark-keys" : TICKMARK_KEYS_PATH;
  int in[2], out[2], err[2];
  EXPECT_EQ(pipe(in), 0);
  EXPECT_EQ(pipe(out), 0);
  EXPECT_EQ(pipe(err), 0);
  posix_spawn_file_actions_t fa;
  posix_spawn_file_actions_init(&fa);
  posix_spawn_file_actions_adddup2(&fa, in[0], 0);
  posix_spawn_file_actions_adddup2(&fa, out[1], 1);
  posix_spawn_file_actions_adddup2(&fa, err[1], 2);
  for (int fd : {in[0], in[1], out[0], out[1], err[0], err[1]}) {
    posix_spawn_file_actions_addclose(&fa, fd);
  }
  std::vector<char*> argv{const_cast<char*>(path.c_str())};
  for (const std::string& a : args) argv.push_back(const_cast<char*>(a.c_str()));
  argv.push_back(nullptr);
  std::vector<std::string> env_store{"TICKMARK_TOKEN=tm_cli_test"};
  std::vector<char*> envp{env_store[0].data(), nullptr};
  pid_t pid = 0;
  Result r;
  const int rc = posix_spawn(&pid, path.c_str(), &fa, nullptr, argv.data(), envp.data());
  posix_spawn_file_actions_destroy(&fa);
  close(in[0]);
  close(out[1]);
  close(err[1]);
  if (rc != 0) {
    ADD_FAILURE() << "cannot run " << path;
    return r;
  }
  signal(SIGPIPE, SIG_IGN);
  EXPECT_EQ(write(in[1], input.data(), input.size()), static_cast<ssize_t>(input.size()));
  close(in[1]);
  r.out = ReadAll(out[0]);
  r.err = ReadAll(err[0]);
  close(out[0]);
  close(err[0]);
  int status = 0;
  waitpid(pid, &status, 0);
  r.exit_code = WIFEXITED(status) ? WEXITSTATUS(status) : 128 + WTERMSIG(status);
  return r;
}

TEST(KeysCliTest, StdinLinesAllAcknowledged) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) {
    s.drop_after = 2;  // the program must ride out lost streams
    s.max_drops = 2;
  });
  const Result r = RunKeys({"--stdin-lines", "--server", target, "--client-id", "cli:ok",
                            "--flush-timeout", "30"},
                           "+1\n# a comment\n-1 key:j\n\n0.5\n-0.25");
  EXPECT_EQ(r.exit_code, 0) << r.err;
  const auto bodies = fake.bodies();
  ASSERT_EQ(bodies.size(), 4u) << r.err;
  std::vector<double> values;
  std::vector<std::string> inputs;
  int64_t prev_t = 0;
  for (const auto& [key, body] : bodies) {
    tickmark::v1::TrainerMessage m;
    ASSERT_TRUE(m.ParseFromString(body));
    values.push_back(m.feedback().value());
    inputs.push_back(m.feedback().input());
    EXPECT_GE(m.feedback().event_source_ns(), prev_t);  // read order, one clock
    prev_t = m.feedback().event_source_ns();
  }
  EXPECT_EQ(values, (std::vector<double>{1.0, -1.0, 0.5, -0.25}));
  EXPECT_EQ(inputs, (std::vector<std::string>{"line", "key:j", "line", "line"}));
  // One "ack" line per message on stdout.
  size_t acks = 0;
  for (size_t p = r.out.find("ack seq="); p != std::string::npos; p = r.out.find("ack seq=", p + 1)) ++acks;
  EXPECT_EQ(acks, 4u) << r.out;
}

TEST(KeysCliTest, RejectionAndBadLinesGiveFailureExit) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) { s.reject = {2}; });
  const Result r = RunKeys({"--stdin-lines", "--server", target, "--client-id", "cli:rej",
                            "--quiet"},
                           "+1\n-1\n");
  EXPECT_EQ(r.exit_code, 1);
  EXPECT_NE(r.err.find("rejected seq=2"), std::string::npos) << r.err;
  const Result bad = RunKeys({"--stdin-lines", "--server", target, "--client-id", "cli:bad",
                              "--quiet"},
                             "+1\nmaybe\n");
  EXPECT_EQ(bad.exit_code, 1);
  EXPECT_NE(bad.err.find("line 2: \"maybe\" is not a number"), std::string::npos) << bad.err;
}

TEST(KeysCliTest, RefusedTokenStopsWithFailureExit) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) {
    s.hello_error = grpc::Status(grpc::StatusCode::UNAUTHENTICATED, "unknown token");
  });
  const Result r = RunKeys({"--stdin-lines", "--server", target, "--client-id", "cli:auth",
                            "--flush-timeout", "30"},
                           "+1\n");
  EXPECT_EQ(r.exit_code, 1);
  EXPECT_NE(r.err.find("UNAUTHENTICATED"), std::string::npos) << r.err;
  EXPECT_EQ(fake.hellos(), 1);
}

TEST(KeysCliTest, UsageErrors) {
  EXPECT_EQ(RunKeys({"--no-such-flag"}, "").exit_code, 2);
  // Not a terminal and no --stdin-lines.
  const Result r = RunKeys({}, "");
  EXPECT_EQ(r.exit_code, 2);
  EXPECT_NE(r.err.find("--stdin-lines"), std::string::npos);
  EXPECT_EQ(RunKeys({"--stdin-lines", "--profile", "/nonexistent.toml"}, "").exit_code, 2);
  EXPECT_EQ(RunKeys({"--help"}, "").exit_code, 0);
}

}  // namespace
}  // namespace tickmark::keys

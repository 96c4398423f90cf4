// tickmark-keys --device and tickmark-serial end to end: each program runs as
// a child process against FakeLive, which drops the stream while the source
// streams; every press must be stored exactly once, with the event time the
// source gave it, and --verbose must print the timing report.
#include <fcntl.h>
#include <pty.h>
#include <signal.h>
#include <spawn.h>
#include <sys/wait.h>
#include <unistd.h>

#include <chrono>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

#include "clients/keys/evdev.h"
#include "gtest/gtest.h"
#include "tests/clients/fake_live.h"

namespace tickmark {
namespace {

namespace fs = std::filesystem;
using tickmark::testing::FakeLive;

std::string Bin(const std::string& name) {
  const char* bin = std::getenv("TICKMARK_BIN");
  return std::string(bin != nullptr ? bin : TICKMARK_BIN_DIR) + "/" + name;
}

class TempDir {
 public:
  TempDir() {
    char tmpl[] = "/tmp/tickmark-devcli-XXXXXX";
    path_ = mkdtemp(tmpl);
  }
  ~TempDir() { fs::remove_all(path_); }
  const std::string& path() const { return path_; }

 private:
  std::string path_;
};

// Starts `program` with stdin from /dev/null and stdout+stderr to `log`.
pid_t Spawn(const std::string& program, const std::vector<std::string>& args,
            const std::string& log) {
  posix_spawn_file_actions_t fa;
  posix_spawn_file_actions_init(&fa);
  posix_spawn_file_actions_addopen(&fa, 0, "/dev/null", O_RDONLY, 0);
  posix_spawn_file_actions_addopen(&fa, 1, log.c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0600);
  posix_spawn_file_actions_adddup2(&fa, 1, 2);
  std::vector<char*> argv{const_cast<char*>(program.c_str())};
  for (const std::string& a : args) argv.push_back(const_cast<char*>(a.c_str()));
  argv.push_back(nullptr);
  std::string token = "TICKMARK_TOKEN=tm_cli_test";
  std::vector<char*> envp{token.data(), nullptr};
  pid_t pid = 0;
  EXPECT_EQ(posix_spawn(&pid, program.c_str(), &fa, nullptr, argv.data(), envp.data()), 0)
      << program;
  posix_spawn_file_actions_destroy(&fa);
  return pid;
}

int StopAndWait(pid_t pid) {
  kill(pid, SIGTERM);
  int status = 0;
  waitpid(pid, &status, 0);
  return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
}

std::string Slurp(const std::string& path) {
  std::ifstream in(path);
  std::stringstream ss;
  ss << in.rdbuf();
  return ss.str();
}

void DropOften(FakeLive& live) {
  live.Edit([](FakeLive::Script& s) {
    s.drop_after = 2;
    s.max_drops = 4;
  });
}

// Waits (deadline 30 s) until `n` messages are stored and the fake has
// dropped the stream at least once.
bool WaitStored(FakeLive& live, size_t n) {
  const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(30);
  while (std::chrono::steady_clock::now() < deadline) {
    if (live.stored().size() >= n && live.drops() >= 1) return true;
    // Woken by every message the fake sees; the timeout only re-checks.
    live.WaitFor([] { return false; }, std::chrono::seconds(1));
  }
  return false;
}

void ExpectEachOnce(FakeLive& live, size_t n) {
  const auto stored = live.stored();
  EXPECT_EQ(stored.size(), n);
  for (const auto& [key, times] : stored) EXPECT_EQ(times, 1) << key.second;
}

TEST(DevicesCli, HelpExitsZero) {
  for (const char* p : {"tickmark-keys", "tickmark-serial"}) {
    TempDir dir;
    const pid_t pid = Spawn(Bin(p), {"--help"}, dir.path() + "/log");
    int status = 0;
    waitpid(pid, &status, 0);
    EXPECT_TRUE(WIFEXITED(status) && WEXITSTATUS(status) == 0) << p;
    EXPECT_NE(Slurp(dir.path() + "/log").find("Usage:"), std::string::npos) << p;
  }
}

TEST(DevicesCli, KeysDeviceExactlyOnceAcrossDrops) {
  FakeLive live;
  const std::string target = live.Start();
  DropOften(live);
  TempDir dir;
  const std::string device = dir.path() + "/event4";
  constexpr size_t kPresses = 8;
  {
    std::ofstream out(device, std::ios::binary);
    for (int i = 0; i < static_cast<int>(kPresses); ++i) {
      const uint16_t code = i % 2 == 0 ? 109 : 104;  // KEY_PAGEDOWN / KEY_PAGEUP
      keys::InputRecord press{70, i * 10'000, 1, code, 1};
      keys::InputRecord release{70, i * 10'000 + 5'000, 1, code, 0};
      keys::InputRecord syn{70, i * 10'000, 0, 0, 0};
      out << keys::EncodeInputRecord(press) << keys::EncodeInputRecord(syn)
          << keys::EncodeInputRecord(release) << keys::EncodeInputRecord(syn);
    }
  }
  const std::string log = dir.path() + "/log";
  const pid_t pid = Spawn(Bin("tickmark-keys"),
                          {"--server", target, "--client-id", "keys-dev-test", "--device",
                           device, "--profile",
                           std::string(TICKMARK_SOURCE_DIR) + "/clients/keys/profiles/clicker.toml",
                           "--verbose"},
                          log);
  EXPECT_TRUE(WaitStored(live, kPresses)) << Slurp(log);
  EXPECT_EQ(StopAndWait(pid), 0) << Slurp(log);
  ExpectEachOnce(live, kPresses);
  for (const auto& [key, body] : live.bodies()) {
    tickmark::v1::TrainerMessage m;
    ASSERT_TRUE(m.ParseFromString(body));
    const int64_t i = static_cast<int64_t>(key.second) - 1;
    EXPECT_EQ(m.feedback().event_source_ns(), 70'000'000'000 + i * 10'000'000);  // record time
    EXPECT_EQ(m.feedback().value(), i % 2 == 0 ? 1.0 : -1.0);                  // clicker.toml
  }
  EXPECT_NE(Slurp(log).find("timing report (input device"), std::string::npos) << Slurp(log);
}

TEST(DevicesCli, SerialExactlyOnceAcrossDrops) {
  FakeLive live;
  const std::string target = live.Start();
  DropOften(live);
  int master = -1;
  int slave = -1;
  char name[256] = {};
  ASSERT_EQ(openpty(&master, &slave, name, nullptr, nullptr), 0);
  TempDir dir;
  const std::string log = dir.path() + "/log";
  const pid_t pid = Spawn(Bin("tickmark-serial"),
                          {"--server", target, "--client-id", "serial-test", "--port", name,
                           "--profile",
                           std::string(TICKMARK_SOURCE_DIR) + "/clients/serial/profiles/line-box.toml",
                           "--verbose"},
                          log);
  constexpr size_t kPresses = 6;
  // Written before the child may have opened the port: the pty keeps the
  // bytes until it reads them.
  std::string lines = "garbage \x01\n";
  for (size_t i = 0; i < kPresses; ++i) {
    lines += (i % 2 == 0 ? "B1" : "B2") + std::string(" down ") + std::to_string(1000 + i * 500000) +
             "\n" + (i % 2 == 0 ? "B1" : "B2") + " up\n";
  }
  ASSERT_EQ(write(master, lines.data(), lines.size()), static_cast<ssize_t>(lines.size()));
  EXPECT_TRUE(WaitStored(live, kPresses)) << Slurp(log);
  EXPECT_EQ(StopAndWait(pid), 0) << Slurp(log);
  ExpectEachOnce(live, kPresses);
  int64_t previous = 0;
  for (const auto& [key, body] : live.bodies()) {
    tickmark::v1::TrainerMessage m;
    ASSERT_TRUE(m.ParseFromString(body));
    EXPECT_EQ(m.feedback().value(), key.second % 2 == 1 ? 1.0 : -1.0);  // line-box.toml
    EXPECT_GT(m.feedback().event_source_ns(), previous);  // box time order kept
    previous = m.feedback().event_source_ns();
  }
  const std::string out = Slurp(log);
  EXPECT_NE(out.find("timing report (serial"), std::string::npos) << out;
  EXPECT_NE(out.find("garbage"), std::string::npos) << out;
  close(master);
  close(slave);
}

}  // namespace
}  // namespace tickmark

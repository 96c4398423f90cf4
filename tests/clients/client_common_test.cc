// Client ids, token reading and channel credential choice (clients/common).
#include <stdlib.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cstdio>
#include <cstring>
#include <fstream>
#include <string>

#include "clients/common/channel.h"
#include "clients/common/client_id.h"
#include "clients/common/token.h"
#include "gtest/gtest.h"

namespace tickmark::client {
namespace {

TEST(ClientIdTest, AllowedCharactersAndLength) {
  // stream.proto, Hello.client_id: letters, digits, '-', '_', '.', ':'; ≤ 64.
  EXPECT_TRUE(ValidateClientId("dock-lab.pc1:alice:tickmark-keys:pts-3").ok());
  EXPECT_TRUE(ValidateClientId(std::string(64, 'a')).ok());
  EXPECT_FALSE(ValidateClientId(std::string(65, 'a')).ok());
  EXPECT_FALSE(ValidateClientId("").ok());
  EXPECT_FALSE(ValidateClientId("has space").ok());
  EXPECT_FALSE(ValidateClientId("slash/y").ok());
}

TEST(ClientIdTest, MadeIdsAreValidAndStable) {
  EXPECT_EQ(MakeClientId("dockpc", "ana", "tickmark-keys", "/dev/pts/3"),
            "dockpc:ana:tickmark-keys:-dev-pts-3");
  const std::string long_host(80, 'h');
  const std::string a = MakeClientId(long_host, "ana", "tickmark-keys", "stdin");
  EXPECT_EQ(a.size(), kMaxClientIdLength);
  EXPECT_TRUE(ValidateClientId(a).ok());
  EXPECT_EQ(a, MakeClientId(long_host, "ana", "tickmark-keys", "stdin"));
  // Cut ids of different inputs still differ (hash suffix).
  EXPECT_NE(a, MakeClientId(long_host, "ana", "tickmark-keys", "pts-1"));
  EXPECT_TRUE(ValidateClientId(DefaultClientId("tickmark-keys", "stdin")).ok());
  EXPECT_EQ(DefaultClientId("tickmark-keys", "stdin"),
            DefaultClientId("tickmark-keys", "stdin"));
}

// Issue 15 part 6: the default id must not hold the OS user name; it stays
// stable across runs (reconnect deduplication) through the state file.
TEST(ClientIdTest, DefaultIdIsStableRandomAndNamesNoUser) {
  const std::string dir = ::testing::TempDir() + "/tm-state-" + std::to_string(getpid());
  const std::string first = InstallationId(dir);
  ASSERT_EQ(first.size(), 14u);
  EXPECT_EQ(first.rfind("i-", 0), 0u);
  EXPECT_EQ(InstallationId(dir), first);  // read back, not made again
  struct stat st {};
  ASSERT_EQ(stat((dir + "/installation-id").c_str(), &st), 0);
  EXPECT_EQ(st.st_mode & 0777, 0600u);
  EXPECT_NE(InstallationId(dir + "-other"), first);  // random per state folder
  if (const char* user = std::getenv("USER"); user != nullptr && std::strlen(user) >= 3) {
    EXPECT_EQ(DefaultClientId("tickmark-keys", "stdin").find(user), std::string::npos);
  }
  EXPECT_EQ(InstallationId(""), "");
}

class TokenTest : public ::testing::Test {
 protected:
  void SetUp() override {
    char tmpl[] = "/tmp/tickmark-token-XXXXXX";
    ASSERT_NE(mkdtemp(tmpl), nullptr);
    dir_ = tmpl;
    unsetenv(kTokenEnvVar);
  }
  void TearDown() override {
    std::remove(path_.c_str());
    rmdir(dir_.c_str());
    unsetenv(kTokenEnvVar);
  }
  std::string Write(const std::string& text, mode_t mode) {
    path_ = dir_ + "/token";
    std::ofstream(path_) << text;
    chmod(path_.c_str(), mode);
    return path_;
  }
  std::string dir_;
  std::string path_;
};

TEST_F(TokenTest, FileIsTrimmedAndPreferred) {
  setenv(kTokenEnvVar, "from-env", 1);
  auto t = ReadToken({Write("tm_secret\n", 0600), ""});
  ASSERT_TRUE(t.ok()) << t.status();
  EXPECT_EQ(t->value, "tm_secret");
  EXPECT_TRUE(t->warnings.empty());
}

TEST_F(TokenTest, WorldReadableFileWarns) {
  auto t = ReadToken({Write("tm_secret", 0644), ""});
  ASSERT_TRUE(t.ok());
  EXPECT_EQ(t->warnings.size(), 1u);
}

TEST_F(TokenTest, ArgvTokenWarnsEnvDoesNot) {
  auto argv = ReadToken({"", "tm_on_argv"});
  ASSERT_TRUE(argv.ok());
  EXPECT_EQ(argv->value, "tm_on_argv");
  EXPECT_EQ(argv->warnings.size(), 1u);
  setenv(kTokenEnvVar, "tm_env\n", 1);
  auto env = ReadToken({"", ""});
  ASSERT_TRUE(env.ok());
  EXPECT_EQ(env->value, "tm_env");
  EXPECT_TRUE(env->warnings.empty());
}

TEST_F(TokenTest, MissingEmptyAndMultiLineAreErrors) {
  EXPECT_EQ(ReadToken({"", ""}).status().code(), absl::StatusCode::kNotFound);
  EXPECT_EQ(ReadToken({Write("\n", 0600), ""}).status().code(),
            absl::StatusCode::kInvalidArgument);
  EXPECT_EQ(ReadToken({Write("a\nb\n", 0600), ""}).status().code(),
            absl::StatusCode::kInvalidArgument);
  EXPECT_FALSE(ReadToken({dir_ + "/absent", ""}).ok());
}

// Regression: the client's own loopback test took every host starting with
// "127." for loopback, so a DNS name like 127.example.org got plaintext.
TEST(ChannelTest, DnsNameStartingWith127IsNotLoopback) {
  EXPECT_FALSE(MayUsePlaintext("127.example.org:7461"));
  EXPECT_FALSE(MayUsePlaintext("dns:///127.example.org:7461"));
  EXPECT_FALSE(MayUsePlaintext("127.0.0.1.example.org:7461"));
  auto choice = ChooseCredentials({"127.example.org:7461", false, ""});
  ASSERT_TRUE(choice.ok());
  EXPECT_TRUE(choice->tls);
}

TEST(ChannelTest, TargetHost) {
  EXPECT_EQ(TargetHost("127.0.0.1:7461"), "127.0.0.1");
  EXPECT_EQ(TargetHost("[::1]:7461"), "::1");
  EXPECT_EQ(TargetHost("dns:///dock.example.org:443"), "dock.example.org");
  EXPECT_EQ(TargetHost("localhost:7461"), "localhost");
  EXPECT_EQ(TargetHost("unix:/run/tickmark.sock"), "unix");
  EXPECT_EQ(TargetHost("::1"), "::1");
}

TEST(ChannelTest, PlaintextOnlyOnLoopbackUnlessAsked) {
  // docs/architecture.md §7: plaintext only on loopback or when explicitly asked for.
  EXPECT_TRUE(MayUsePlaintext("127.0.0.1:7461"));
  EXPECT_TRUE(MayUsePlaintext("127.3.2.1:7461"));  // RFC 1122 §3.2.1.3: 127/8 is loopback
  EXPECT_TRUE(MayUsePlaintext("[::1]:7461"));      // RFC 4291 §2.5.3
  EXPECT_TRUE(MayUsePlaintext("LocalHost:7461"));  // RFC 6761 §6.3
  EXPECT_TRUE(MayUsePlaintext("ipv4:127.0.0.1:7461"));
  EXPECT_TRUE(MayUsePlaintext("unix:/run/tickmark.sock"));
  EXPECT_FALSE(MayUsePlaintext("10.0.0.5:7461"));
  EXPECT_FALSE(MayUsePlaintext("127example.org:7461"));

  auto loop = ChooseCredentials({"127.0.0.1:7461", false, ""});
  ASSERT_TRUE(loop.ok());
  EXPECT_FALSE(loop->tls);
  auto remote = ChooseCredentials({"dock.example.org:7461", false, ""});
  ASSERT_TRUE(remote.ok());
  EXPECT_TRUE(remote->tls);
  auto asked = ChooseCredentials({"dock.example.org:7461", true, ""});
  ASSERT_TRUE(asked.ok());
  EXPECT_FALSE(asked->tls);
  EXPECT_FALSE(ChooseCredentials({"x:1", true, "/ca.pem"}).ok());
  EXPECT_FALSE(ChooseCredentials({"x:1", false, "/nonexistent/ca.pem"}).ok());
}

}  // namespace
}  // namespace tickmark::client

// The one loopback rule (server/net/address.h): IP literals are parsed, names
// other than "localhost" are never taken for loopback.
#include "server/net/address.h"

#include <gtest/gtest.h>

namespace tickmark::net {
namespace {

TEST(AddressTest, HostOfSplitsHostAndPort) {
  EXPECT_EQ(HostOf("127.0.0.1:7461"), "127.0.0.1");
  EXPECT_EQ(HostOf("[::1]:7461"), "::1");
  EXPECT_EQ(HostOf("[::1]"), "::1");
  EXPECT_EQ(HostOf("::1"), "::1");  // bare IPv6, no port
  EXPECT_EQ(HostOf("example.org:443"), "example.org");
  EXPECT_EQ(HostOf("example.org"), "example.org");
}

TEST(AddressTest, LoopbackLiteralsAndLocalhost) {
  EXPECT_TRUE(IsLoopbackHost("127.0.0.1"));
  EXPECT_TRUE(IsLoopbackHost("127.3.2.1"));         // RFC 1122 §3.2.1.3: all of 127/8
  EXPECT_TRUE(IsLoopbackHost("::1"));               // RFC 4291 §2.5.3
  EXPECT_TRUE(IsLoopbackHost("0:0:0:0:0:0:0:1"));   // RFC 4291 §2.5.3, long form
  EXPECT_TRUE(IsLoopbackHost("::ffff:127.0.0.1"));  // RFC 4291 §2.5.5.2, v4-mapped
  EXPECT_TRUE(IsLoopbackHost("LocalHost"));         // RFC 6761 §6.3
  EXPECT_TRUE(IsLoopbackTarget("localhost:7461"));
  EXPECT_TRUE(IsLoopbackTarget("[::1]:7461"));
}

// Regression: a spelling test ("starts with 127.") let DNS names through.
TEST(AddressTest, NamesThatLookLikeLoopbackAreNotLoopback) {
  EXPECT_FALSE(IsLoopbackHost("127.example.org"));
  EXPECT_FALSE(IsLoopbackTarget("127.example.org:7461"));
  EXPECT_FALSE(IsLoopbackHost("127example.org"));
  EXPECT_FALSE(IsLoopbackHost("10.0.0.5"));
  EXPECT_FALSE(IsLoopbackHost("0.0.0.0"));  // the wildcard is every interface, not loopback
  EXPECT_FALSE(IsLoopbackHost("::"));
  EXPECT_FALSE(IsLoopbackHost(""));
  EXPECT_FALSE(IsLoopbackHost("128.0.0.1"));
}

}  // namespace
}  // namespace tickmark::net

// The UDP probe port's datagrams and the server's table, fed bytes: layout
// and MAC against Python's hmac module, tampered, foreign and replayed
// datagrams dropped and counted, samples in the clock model's roles.
#include "server/net/probe_datagram.h"

#include <gtest/gtest.h>

#include <string>
#include <vector>

#include "server/core/clock_model.h"
#include "server/net/udp_probe_table.h"

namespace tickmark::net {
namespace {

std::string Hex(const std::string& b) {
  static constexpr char kDigits[] = "0123456789abcdef";
  std::string out;
  for (unsigned char c : b) {
    out.push_back(kDigits[c >> 4]);
    out.push_back(kDigits[c & 15]);
  }
  return out;
}

std::string Key(char first) {
  std::string k(kProbeKeyBytes, '\0');
  for (size_t i = 0; i < k.size(); ++i) k[i] = static_cast<char>(static_cast<size_t>(first) + i);
  return k;
}

constexpr uint64_t kTag = 0x0102030405060708;

TEST(ProbeDatagram, RequestLayoutAndMacMatchPythonHmac) {
  const std::string bytes = EncodeProbeDatagram({ProbeDatagramKind::kRequest, kTag, 42}, Key(0));
  // Python 3: hmac.new(bytes(range(32)), body, hashlib.sha256).hexdigest()
  EXPECT_EQ(Hex(bytes),
            "544d5531010000000102030405060708000000000000002a"
            "b6d13b51ec763f3e192c781a3e6840a7d930a53517babb90db76911c87811e68");
}

TEST(ProbeDatagram, AnswerLayoutAndMacMatchPythonHmac) {
  ProbeDatagram d{ProbeDatagramKind::kAnswer, kTag, 42, 1'700'000'000'000'000'000, -5, 7};
  const std::string bytes = EncodeProbeDatagram(d, Key(0));
  // Python 3: hmac.new(bytes(range(32)), body, hashlib.sha256), body packed '>QQqqq'
  EXPECT_EQ(Hex(bytes),
            "544d5531030000000102030405060708000000000000002a17979cfe362a0000"
            "fffffffffffffffb0000000000000007"
            "0501952f21eefb88ef860aa69a514be4a09c4490cb3250ca140f4edc09a6651b");
  ProbeDatagram back;
  ASSERT_EQ(DecodeProbeDatagram(bytes, Key(0), &back), ProbeDecodeResult::kOk);
  EXPECT_EQ(back, d);
  EXPECT_EQ(PeekProbeTag(bytes), kTag);
}

TEST(ProbeDatagram, EveryKindRoundTrips) {
  for (const ProbeDatagram& d :
       {ProbeDatagram{ProbeDatagramKind::kRequest, 1, 2},
        ProbeDatagram{ProbeDatagramKind::kChallenge, 3, 4, 5},
        ProbeDatagram{ProbeDatagramKind::kAnswer, ~0ULL, ~0ULL, INT64_MIN, INT64_MAX, 0}}) {
    ProbeDatagram back;
    ASSERT_EQ(DecodeProbeDatagram(EncodeProbeDatagram(d, Key(7)), Key(7), &back),
              ProbeDecodeResult::kOk);
    EXPECT_EQ(back, d);
  }
}

TEST(ProbeDatagram, TamperedWrongKeyAndMalformedAreRefused) {
  const ProbeDatagram d{ProbeDatagramKind::kAnswer, kTag, 9, 100, 200, 300};
  const std::string good = EncodeProbeDatagram(d, Key(0));
  ProbeDatagram out;
  // Any flipped bit of body or MAC breaks the MAC; header damage is malformed.
  for (size_t i = 8; i < good.size(); ++i) {
    std::string bad = good;
    bad[i] = static_cast<char>(bad[i] ^ 0x01);
    EXPECT_EQ(DecodeProbeDatagram(bad, Key(0), &out), ProbeDecodeResult::kBadMac) << "byte " << i;
  }
  for (size_t i = 0; i < 8; ++i) {
    std::string bad = good;
    bad[i] = static_cast<char>(bad[i] ^ 0x01);
    EXPECT_EQ(DecodeProbeDatagram(bad, Key(0), &out), ProbeDecodeResult::kMalformed)
        << "byte " << i;
    EXPECT_FALSE(PeekProbeTag(bad).has_value());
  }
  EXPECT_EQ(DecodeProbeDatagram(good, Key(1), &out), ProbeDecodeResult::kBadMac);
  EXPECT_EQ(DecodeProbeDatagram(good.substr(0, good.size() - 1), Key(0), &out),
            ProbeDecodeResult::kMalformed);
  EXPECT_EQ(DecodeProbeDatagram(good + "x", Key(0), &out), ProbeDecodeResult::kMalformed);
  EXPECT_EQ(DecodeProbeDatagram("", Key(0), &out), ProbeDecodeResult::kMalformed);
  // A request's bytes relabelled as an answer have the wrong size.
  std::string relabelled = EncodeProbeDatagram({ProbeDatagramKind::kRequest, kTag, 9}, Key(0));
  relabelled[4] = static_cast<char>(ProbeDatagramKind::kAnswer);
  EXPECT_EQ(DecodeProbeDatagram(relabelled, Key(0), &out), ProbeDecodeResult::kMalformed);
}

// The server's table with a hand-driven session clock.
class TableTest : public ::testing::Test {
 protected:
  void SetUp() override {
    table_.Add(kTag, UdpProbeStream{Key(0), [this] { return SessionTime::FromNanos(now_ns_); },
                                    [this](uint64_t id, const ProbeTimestamps& ts) {
                                      ids_.push_back(id);
                                      samples_.push_back(ts);
                                    }});
  }

  std::string Request(uint64_t id, const std::string& key = Key(0)) {
    return EncodeProbeDatagram({ProbeDatagramKind::kRequest, kTag, id}, key);
  }
  std::string Answer(const ProbeDatagram& challenge, int64_t t2, int64_t t3) {
    return EncodeProbeDatagram(
        {ProbeDatagramKind::kAnswer, kTag, challenge.id, challenge.t1_session_ns, t2, t3}, Key(0));
  }
  ProbeDatagram Challenge(const std::string& bytes) {
    ProbeDatagram c;
    EXPECT_EQ(DecodeProbeDatagram(bytes, Key(0), &c), ProbeDecodeResult::kOk);
    EXPECT_EQ(c.kind, ProbeDatagramKind::kChallenge);
    return c;
  }

  UdpProbeTable table_;
  int64_t now_ns_ = 1'000'000'000;
  std::vector<uint64_t> ids_;
  std::vector<ProbeTimestamps> samples_;
};

TEST_F(TableTest, ExchangeGivesTheFourTimestampsInClockModelRoles) {
  now_ns_ = 10'000;
  const ProbeDatagram c = Challenge(table_.Handle(Request(1)));
  EXPECT_EQ(c.id, 1u);
  EXPECT_EQ(c.t1_session_ns, 10'000);  // T1 stamped on the session clock
  // Client 5 000 ns ahead; 100 ns each way; held 50 ns.
  now_ns_ = 10'250;
  EXPECT_EQ(table_.Handle(Answer(c, 15'100, 15'150)), "");
  ASSERT_EQ(samples_.size(), 1u);
  EXPECT_EQ(ids_[0], 1u);
  const ProbeTimestamps& ts = samples_[0];
  EXPECT_EQ(ts.t1.nanos(), 10'000);
  EXPECT_EQ(ts.t2.nanos(), 15'100);
  EXPECT_EQ(ts.t3.nanos(), 15'150);
  EXPECT_EQ(ts.t4.nanos(), 10'250);
  // RFC 5905 §8: θ = ((T2−T1)+(T3−T4))/2 = (5100+4900)/2, δ = (T4−T1)−(T3−T2) = 250−50
  const OnWire w = ComputeOnWire(ts);
  EXPECT_EQ(w.offset.nanos(), 5'000);
  EXPECT_EQ(w.delay.nanos(), 200);
  ClockModel model;
  EXPECT_EQ(model.AddProbe(ts), ProbeVerdict::kAccepted);
  EXPECT_EQ(table_.counters().samples, 1u);
  EXPECT_EQ(table_.counters().challenged, 1u);
}

TEST_F(TableTest, ReplayedAnswerAndRequestAreDroppedAndCounted) {
  const ProbeDatagram c = Challenge(table_.Handle(Request(5)));
  const std::string answer = Answer(c, 2'000'000'000, 2'000'000'100);
  table_.Handle(answer);
  EXPECT_EQ(table_.Handle(answer), "");      // the same answer again
  EXPECT_EQ(table_.Handle(Request(5)), "");  // the same request again
  EXPECT_EQ(table_.Handle(Request(4)), "");  // an older request
  EXPECT_EQ(samples_.size(), 1u);
  EXPECT_EQ(table_.counters().replayed, 3u);
  // A newer id is fine.
  EXPECT_NE(table_.Handle(Request(6)), "");
}

TEST_F(TableTest, AnswerWithAnotherT1OrToNoChallengeIsDropped) {
  ProbeDatagram c = Challenge(table_.Handle(Request(1)));
  c.t1_session_ns += 1;  // pretend the challenge said otherwise
  EXPECT_EQ(table_.Handle(Answer(c, 5, 6)), "");
  ProbeDatagram never{ProbeDatagramKind::kChallenge, kTag, 99, 0};
  EXPECT_EQ(table_.Handle(Answer(never, 5, 6)), "");
  EXPECT_TRUE(samples_.empty());
  EXPECT_EQ(table_.counters().replayed, 2u);
}

TEST_F(TableTest, ForeignTamperedAndMisdirectedDatagramsAreCounted) {
  EXPECT_EQ(table_.Handle(Request(1, Key(9))), "");  // right tag, wrong key
  std::string flipped = Request(2);
  flipped[20] = static_cast<char>(flipped[20] ^ 0x40);
  EXPECT_EQ(table_.Handle(flipped), "");
  EXPECT_EQ(table_.Handle(EncodeProbeDatagram({ProbeDatagramKind::kRequest, kTag + 1, 1}, Key(0))),
            "");
  EXPECT_EQ(table_.Handle("hello"), "");
  // A challenge sent to the server (reflected back at it) earns nothing.
  EXPECT_EQ(table_.Handle(EncodeProbeDatagram({ProbeDatagramKind::kChallenge, kTag, 1, 5}, Key(0))),
            "");
  const UdpProbeCounters n = table_.counters();
  EXPECT_EQ(n.bad_mac, 2u);
  EXPECT_EQ(n.unknown_tag, 1u);
  EXPECT_EQ(n.malformed, 1u);
  EXPECT_EQ(n.wrong_kind, 1u);
  EXPECT_EQ(n.received, 5u);
  EXPECT_EQ(n.challenged, 0u);
  // A tampered request did not consume its id.
  EXPECT_NE(table_.Handle(Request(2)), "");
}

TEST_F(TableTest, DropsOfAStreamCountLostChallengesReplaysAndBadMacs) {
  const ProbeDatagram answered = Challenge(table_.Handle(Request(1)));
  table_.Handle(Answer(answered, 5, 6));
  Challenge(table_.Handle(Request(2)));  // never answered
  EXPECT_EQ(table_.DropsOf(kTag), 0u);   // not yet overdue
  now_ns_ += UdpProbeTable::kAnswerWithin.nanos() + 1;
  EXPECT_EQ(table_.DropsOf(kTag), 1u);    // the unanswered challenge is lost
  table_.Handle(Answer(answered, 5, 6));  // replayed
  table_.Handle(Request(3, Key(9)));      // bad MAC under this tag
  EXPECT_EQ(table_.DropsOf(kTag), 3u);
  EXPECT_EQ(table_.DropsOf(kTag + 1), 0u);  // unknown tag
  // More challenges than the table remembers: the forgotten ones are lost.
  for (uint64_t id = 10; id < 10 + UdpProbeTable::kRememberedChallenges + 2; ++id) {
    Challenge(table_.Handle(Request(id)));
  }
  // 18 more: requests 2, 10 and 11 are pushed out (2 was counted as overdue
  // already), and none of the rest is overdue yet.
  EXPECT_EQ(table_.DropsOf(kTag), 3u + 2u);
}

TEST_F(TableTest, RemovedStreamIsUnknownAndItsChallengesDie) {
  const ProbeDatagram c = Challenge(table_.Handle(Request(1)));
  table_.Remove(kTag);
  EXPECT_EQ(table_.Handle(Answer(c, 5, 6)), "");
  EXPECT_EQ(table_.counters().unknown_tag, 1u);
  EXPECT_TRUE(samples_.empty());
}

}  // namespace
}  // namespace tickmark::net

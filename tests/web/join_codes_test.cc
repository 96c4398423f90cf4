// JoinCodeStore: single use, expiry, the rate limits, and the code format,
// on a hand-driven clock.
#include "server/web/join_codes.h"

#include <gtest/gtest.h>

#include <set>

namespace tickmark::web {
namespace {

namespace v1 = tickmark::v1;

Invite TrainerInvite() {
  Invite i;
  i.session_id = "s-1";
  i.role = v1::ROLE_TRAINER;
  i.subject = "tr-07";
  return i;
}

class JoinCodesTest : public ::testing::Test {
 protected:
  FakeMonotonic clock_;
};

TEST_F(JoinCodesTest, ACodeWorksOnceAndCarriesItsInvite) {
  JoinCodeStore store(&clock_, {});
  auto code = store.Create(TrainerInvite(), Duration::Seconds(900));
  ASSERT_TRUE(code.ok()) << code.status();
  auto invite = store.Redeem(*code, "10.0.0.1");
  ASSERT_TRUE(invite.ok()) << invite.status();
  EXPECT_EQ(invite->session_id, "s-1");
  EXPECT_EQ(invite->role, v1::ROLE_TRAINER);
  EXPECT_EQ(invite->subject, "tr-07");
  auto again = store.Redeem(*code, "10.0.0.1");
  EXPECT_EQ(again.status().code(), absl::StatusCode::kFailedPrecondition);
  EXPECT_NE(again.status().message().find("used already"), std::string::npos);
  EXPECT_EQ(store.live_codes(), 0u);
}

TEST_F(JoinCodesTest, ReleaseGivesACodeBackAfterAFailedIssue) {
  JoinCodeStore store(&clock_, {});
  auto code = store.Create(TrainerInvite(), Duration::Seconds(60));
  ASSERT_TRUE(store.Redeem(*code, "p").ok());
  store.Release(*code);
  EXPECT_TRUE(store.Redeem(*code, "p").ok());
}

TEST_F(JoinCodesTest, ExpiresAtItsTimeAndIsThenForgottenAfterADay) {
  JoinCodeStore store(&clock_, {});
  auto early = store.Create(TrainerInvite(), Duration::Seconds(900));
  auto late = store.Create(TrainerInvite(), Duration::Seconds(900));
  auto forgotten = store.Create(TrainerInvite(), Duration::Seconds(900));
  clock_.Advance(Duration::Seconds(900) - Duration::Nanos(1));
  EXPECT_TRUE(store.Redeem(*early, "p").ok());  // the last nanosecond still counts
  clock_.Advance(Duration::Nanos(1));
  auto expired = store.Redeem(*late, "p");
  EXPECT_EQ(expired.status().code(), absl::StatusCode::kDeadlineExceeded);
  EXPECT_NE(expired.status().message().find("expired"), std::string::npos);
  clock_.Advance(Duration::Seconds(24 * 3600 + 1));
  EXPECT_EQ(store.Redeem(*forgotten, "p").status().code(), absl::StatusCode::kNotFound);
}

TEST_F(JoinCodesTest, UnknownAndMalformedCodesAreToldApart) {
  JoinCodeStore store(&clock_, {});
  ASSERT_TRUE(store.Create(TrainerInvite(), Duration::Seconds(60)).ok());
  EXPECT_EQ(store.Redeem("ZZZZ-ZZZZ-ZZZZ-ZZZZ", "p").status().code(), absl::StatusCode::kNotFound);
  for (const char* bad : {"", "ZZZZ", "ZZZZ-ZZZZ-ZZZZ-ZZZZ-Z", "UUUU-ZZZZ-ZZZZ-ZZZZ",
                          "ZZZZ/ZZZZ/ZZZZ/ZZZZ", "<script>"}) {
    EXPECT_EQ(store.Redeem(bad, "p").status().code(), absl::StatusCode::kInvalidArgument) << bad;
  }
}

TEST_F(JoinCodesTest, ReadingIsForgivingTheWayCrockfordBase32Is) {
  // Crockford, "Base 32" (crockford.com/base32.html): the alphabet has no I,
  // L, O or U; on decoding, case is ignored, I and L read as 1, O as 0.
  JoinCodeStore store(&clock_, {});
  auto code = store.Create(TrainerInvite(), Duration::Seconds(60));
  ASSERT_TRUE(code.ok());
  ASSERT_EQ(code->size(), 19u);
  for (size_t i = 0; i < code->size(); ++i) {
    const char c = (*code)[i];
    if (i % 5 == 4) {
      EXPECT_EQ(c, '-');
    } else {
      EXPECT_NE(std::string("0123456789ABCDEFGHJKMNPQRSTVWXYZ").find(c), std::string::npos) << c;
    }
  }
  EXPECT_EQ(JoinCodeStore::Normalize("o1il-abcd-efgh-jkmn"), "0111ABCDEFGHJKMN");
  EXPECT_EQ(JoinCodeStore::Normalize(" 0111 ABCD EFGH JKMN "), "0111ABCDEFGHJKMN");
  EXPECT_EQ(JoinCodeStore::Display("0111ABCDEFGHJKMN"), "0111-ABCD-EFGH-JKMN");
  std::string lower;
  for (char c : *code) lower.push_back(static_cast<char>(std::tolower(c)));
  EXPECT_TRUE(store.Redeem(lower, "p").ok());
}

TEST_F(JoinCodesTest, CodesDoNotRepeat) {
  JoinCodeStore store(&clock_, {});
  std::set<std::string> seen;
  for (int i = 0; i < 2000; ++i) {
    auto code = store.Create(TrainerInvite(), Duration::Seconds(60));
    ASSERT_TRUE(code.ok());
    EXPECT_TRUE(seen.insert(*code).second) << *code;
  }
}

TEST_F(JoinCodesTest, AttemptsAreLimitedPerAddressFailuresIncluded) {
  JoinCodeStore::Options o;  // 10 at once, then one every 6 s, per address
  JoinCodeStore store(&clock_, o);
  auto code = store.Create(TrainerInvite(), Duration::Seconds(3600));
  for (int i = 0; i < 10; ++i) {
    EXPECT_EQ(store.Redeem("ZZZZ-ZZZZ-ZZZZ-ZZZZ", "10.0.0.9").status().code(),
              absl::StatusCode::kNotFound);
  }
  // Even the right code is refused now, from that address...
  auto limited = store.Redeem(*code, "10.0.0.9");
  EXPECT_EQ(limited.status().code(), absl::StatusCode::kResourceExhausted);
  EXPECT_NE(limited.status().message().find("too many"), std::string::npos);
  // ...and the refusal did not use the code up.
  clock_.Advance(Duration::Seconds(6));
  EXPECT_TRUE(store.Redeem(*code, "10.0.0.9").ok());
  // Another address was never limited.
  auto other = store.Create(TrainerInvite(), Duration::Seconds(3600));
  EXPECT_TRUE(store.Redeem(*other, "10.0.0.10").ok());
}

TEST_F(JoinCodesTest, AttemptsAreLimitedInTotalAcrossAddresses) {
  JoinCodeStore::Options o;
  o.total_rate_per_s = 1;
  o.total_burst = 3;
  JoinCodeStore store(&clock_, o);
  for (int i = 0; i < 3; ++i) {
    EXPECT_EQ(store.Redeem("ZZZZ-ZZZZ-ZZZZ-ZZZZ", "10.0.1." + std::to_string(i)).status().code(),
              absl::StatusCode::kNotFound);
  }
  EXPECT_EQ(store.Redeem("ZZZZ-ZZZZ-ZZZZ-ZZZZ", "10.0.1.99").status().code(),
            absl::StatusCode::kResourceExhausted);
  clock_.Advance(Duration::Seconds(1));
  EXPECT_EQ(store.Redeem("ZZZZ-ZZZZ-ZZZZ-ZZZZ", "10.0.1.99").status().code(),
            absl::StatusCode::kNotFound);
}

TEST_F(JoinCodesTest, LifetimeAndOpenCodesAreBounded) {
  JoinCodeStore::Options o;
  o.max_live_codes = 2;
  JoinCodeStore store(&clock_, o);
  EXPECT_EQ(store.Create(TrainerInvite(), Duration::Zero()).status().code(),
            absl::StatusCode::kInvalidArgument);
  EXPECT_EQ(store.Create(TrainerInvite(), o.max_ttl + Duration::Nanos(1)).status().code(),
            absl::StatusCode::kInvalidArgument);
  ASSERT_TRUE(store.Create(TrainerInvite(), Duration::Seconds(10)).ok());
  ASSERT_TRUE(store.Create(TrainerInvite(), Duration::Seconds(20)).ok());
  EXPECT_EQ(store.Create(TrainerInvite(), Duration::Seconds(10)).status().code(),
            absl::StatusCode::kResourceExhausted);
  clock_.Advance(Duration::Seconds(11));  // the first has expired: room again
  EXPECT_TRUE(store.Create(TrainerInvite(), Duration::Seconds(10)).ok());
}

}  // namespace
}  // namespace tickmark::web

// Chain version 2 and erasure in the SQLite ledger, checked with the audit
// verifier (server/audit), and the Ed25519 receipt format (docs/audit.md).
// The end-to-end checks (openssl CLI, tampered files, byte scans through a
// real tickmarkd) are in tests/python/test_audit.py.
#include <gtest/gtest.h>
#include <sqlite3.h>
#include <sys/stat.h>

#include <filesystem>
#include <fstream>
#include <future>
#include <sstream>

#include "server/audit/chain_verifier.h"
#include "server/audit/receipt.h"
#include "server/ledger/sqlite/sqlite_ledger.h"
#include "tests/ledger/ledger_test_util.h"

namespace tickmark::ledger {
namespace {

namespace v1 = tickmark::v1;

class AuditLedgerTest : public testing::SqliteLedgerTest {
 protected:
  void SetUp() override {
    testing::SqliteLedgerTest::SetUp();
    SessionRow row = testing::Session("s-2");
    row.chain_version = kChainVersion;
    ASSERT_TRUE(ledger_->CreateSession(row).ok());
    ASSERT_TRUE(ledger_->CreateSession(testing::Session("s-1")).ok());  // chain version 1
  }
  static v1::Record Secret(const std::string& trainer, uint64_t cseq, const std::string& input) {
    v1::Record r = testing::FeedbackRecord("c-" + trainer, cseq, 0.25);
    r.mutable_feedback()->set_trainer(trainer);
    r.mutable_feedback()->set_input(input);
    r.mutable_feedback()->set_audio_sha256(std::string(32, '\x5a'));
    return r;
  }
  std::string FileBytes() {
    std::string all;
    for (const char* suffix : {"", "-wal"}) {
      std::ifstream in(path_ + suffix, std::ios::binary);
      std::stringstream ss;
      ss << in.rdbuf();
      all += ss.str();
    }
    return all;
  }
  audit::VerifyResult Verify() {
    audit::VerifyOptions o;
    o.ledger_path = path_;
    auto r = audit::VerifyLedgerFile(o);
    EXPECT_TRUE(r.ok()) << r.status().message();
    return r.ok() ? *r : audit::VerifyResult{};
  }
};

TEST_F(AuditLedgerTest, PersonalFieldsEnterTheChainOnlyAsASaltedDigest) {
  auto committed = AppendSync("s-2", {Secret("p-ava", 1, "key:ava-secret-1")});
  const v1::Feedback& f = committed[0].feedback();
  EXPECT_EQ(f.personal_digest().size(), 32u);
  EXPECT_EQ(f.input(), "key:ava-secret-1");  // the caller's record keeps its content
  auto body = CanonicalBody(committed[0]);
  ASSERT_TRUE(body.ok());
  EXPECT_EQ(body->find("ava-secret"), std::string::npos);
  auto read = ledger_->Read("s-2", 1, 10);
  ASSERT_TRUE(read.ok());
  ASSERT_EQ(read->size(), 1u);
  EXPECT_EQ((*read)[0].feedback().input(), "key:ava-secret-1");  // restored on read
  EXPECT_EQ((*read)[0].feedback().value(), 0.25);
  EXPECT_EQ((*read)[0].hash(), committed[0].hash());
  // Same content, different salt: the digests differ.
  auto again = AppendSync("s-2", {Secret("p-ava", 2, "key:ava-secret-1")});
  EXPECT_NE(again[0].feedback().personal_digest(), f.personal_digest());
  // A version-1 session hashes the whole record, as before.
  auto old = AppendSync("s-1", {Secret("p-ava", 1, "key:old")});
  EXPECT_TRUE(old[0].feedback().personal_digest().empty());
  auto v = Verify();
  EXPECT_TRUE(v.ok());
  ASSERT_EQ(v.sessions.size(), 2u);
  EXPECT_EQ(v.sessions[1].session_id, "s-2");
  EXPECT_EQ(v.sessions[1].personal_kept, 2u);
}

TEST_F(AuditLedgerTest, ErasureRemovesTheContentAndEveryChainStillVerifies) {
  AppendSync("s-2", {Secret("p-ava", 1, "key:ava-secret-2"), Secret("p-ben", 1, "key:ben-kept")});
  ASSERT_TRUE(ledger_->CloseSession("s-2", 5).ok());
  auto held = ledger_->FindPersonalContent("p-ava");
  ASSERT_TRUE(held.ok());
  ASSERT_EQ(held->size(), 1u);
  EXPECT_EQ((*held)[0].sequences, std::vector<uint64_t>{1});
  v1::Record erasure;
  erasure.mutable_erasure()->set_participant("p-ava");
  erasure.mutable_erasure()->add_sequences(1);
  AppendSync("s-2", {erasure});
  ASSERT_TRUE(ledger_->ErasePersonalContent("p-ava", {"s-2"}).ok());
  EXPECT_EQ(FileBytes().find("ava-secret-2"), std::string::npos);
  EXPECT_NE(FileBytes().find("ben-kept"), std::string::npos);
  auto read = ledger_->Read("s-2", 1, 10);
  ASSERT_TRUE(read.ok());
  EXPECT_EQ((*read)[0].feedback().input(), "");
  EXPECT_EQ((*read)[1].feedback().input(), "key:ben-kept");
  auto v = Verify();
  EXPECT_TRUE(v.ok());
  EXPECT_EQ(v.sessions[1].personal_erased, 1u);
  EXPECT_EQ(v.sessions[1].personal_kept, 1u);
  EXPECT_TRUE(ledger_->FindPersonalContent("p-ava")->empty());
}

TEST_F(AuditLedgerTest, ContentDeletedWithoutAnErasureRecordIsReported) {
  AppendSync("s-2", {Secret("p-ava", 1, "key:x"), Secret("p-ava", 2, "key:y")});
  ASSERT_TRUE(ledger_->Flush().ok());
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open(path_.c_str(), &db), SQLITE_OK);
  ASSERT_EQ(sqlite3_exec(db, "DELETE FROM personal WHERE seq = 2", nullptr, nullptr, nullptr),
            SQLITE_OK);
  sqlite3_close(db);
  auto v = Verify();
  EXPECT_FALSE(v.ok());
  EXPECT_EQ(v.sessions[1].broken_sequence, 2u);
  EXPECT_NE(v.sessions[1].problem.find("personal content missing"), std::string::npos);
}

TEST(ReceiptTest, SignedFileRoundTripsAndVerifies) {
  const std::string dir = testing::MakeTempDir("tm-receipt");
  auto key = audit::ReceiptKey::LoadOrCreate(dir);
  ASSERT_TRUE(key.ok()) << key.status().message();
  struct stat st {};
  ASSERT_EQ(stat((dir + "/receipt-key.pem").c_str(), &st), 0);
  EXPECT_EQ(st.st_mode & 0777, 0600u);
  auto same = audit::ReceiptKey::LoadOrCreate(dir);
  ASSERT_TRUE(same.ok());
  EXPECT_EQ((*same)->public_pem(), (*key)->public_pem());  // made once, then loaded
  v1::Receipt r;
  r.set_session_id("s-7f3a2c91");
  r.set_last_sequence(412);
  r.set_head_hash(std::string(32, '\x11'));
  r.set_chain_version(2);
  r.set_signed_utc(audit::Rfc3339Nanos(1'764'756'902'123'456'789));
  ASSERT_TRUE((*key)->Sign(&r).ok());
  EXPECT_EQ(r.signature().size(), 64u);                         // RFC 8032 §5.1.6
  EXPECT_EQ(r.signed_utc(), "2025-12-03T10:15:02.123456789Z");  // date(1): @1764756902 UTC
  const std::string text = audit::ReceiptFileText(r);
  EXPECT_EQ(text.substr(0, 48), "tickmark receipt 1\nsession: s-7f3a2c91\nlast_sequ");
  auto parsed = audit::ParseReceiptFile(text);
  ASSERT_TRUE(parsed.ok()) << parsed.status().message();
  EXPECT_EQ(parsed->message(), r.message());
  EXPECT_EQ(parsed->head_hash(), r.head_hash());
  EXPECT_TRUE(audit::VerifySignature((*key)->public_pem(), r.message(), r.signature()).ok());
  std::string altered = r.message();
  altered[altered.find("412")] = '5';
  EXPECT_FALSE(audit::VerifySignature((*key)->public_pem(), altered, r.signature()).ok());
  EXPECT_FALSE(audit::ParseReceiptFile("hello\n").ok());
  std::filesystem::remove_all(dir);
}

}  // namespace
}  // namespace tickmark::ledger

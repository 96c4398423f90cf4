// SessionRuntime::AppendClientRecord against ledgers that call back on the
// caller's thread, fail fast, or hold commits back: each client record is
// answered exactly once, with the committed sequence, and a key sent twice
// is stored once.
#include "server/rpc/session_hub.h"

#include <gtest/gtest.h>

#include <chrono>
#include <condition_variable>
#include <cstdlib>
#include <deque>
#include <future>
#include <memory>
#include <mutex>
#include <optional>
#include <thread>
#include <vector>

#include "server/ledger/sqlite/sqlite_ledger.h"
#include "tests/rpc/forwarding_ledger.h"
#include "tests/rpc/fault_ledger.h"
#include "tests/rpc/test_server.h"

namespace tickmark::testing {
namespace {

using Mode = FaultLedger::Mode;
namespace v1 = tickmark::v1;

// Passes everything to `inner`, but keeps the commit callbacks of client
// records until Release(), and returns a provisional sequence that is not
// the committed one (the contract allows them to differ).
class HoldingLedger final : public ForwardingLedger {
 public:
  static constexpr uint64_t kProvisionalOffset = 1000;
  explicit HoldingLedger(ledger::Ledger* inner) : ForwardingLedger(inner) {}

  absl::StatusOr<uint64_t> Append(std::string_view session_id, std::vector<v1::Record> records,
                                  ledger::CommitCallback done) override {
    const bool client = !records.empty() && ledger::ClientKeyOf(records.front()).has_value();
    if (!client) return inner()->Append(session_id, std::move(records), std::move(done));
    auto first = inner()->Append(
        session_id, std::move(records),
        [this, done](const absl::Status& s, const std::vector<v1::Record>& committed) {
          std::lock_guard<std::mutex> lock(mu_);
          held_.push_back([done, s, committed] { done(s, committed); });
          cv_.notify_all();
        });
    client_appends_.fetch_add(1);
    if (!first.ok()) return first;
    return *first + kProvisionalOffset;
  }
  // Waits (with a deadline) until `n` commits are held, then runs them here.
  bool Release(size_t n) {
    std::deque<std::function<void()>> run;
    {
      std::unique_lock<std::mutex> lock(mu_);
      if (!cv_.wait_for(lock, std::chrono::seconds(30), [&] { return held_.size() >= n; })) {
        return false;
      }
      run.swap(held_);
    }
    for (auto& f : run) f();
    return true;
  }
  uint64_t client_appends() const { return client_appends_.load(); }


 private:
  std::mutex mu_;
  std::condition_variable cv_;
  std::deque<std::function<void()>> held_;  // GUARDED_BY(mu_)
  std::atomic<uint64_t> client_appends_{0};
};

// Collects acks from any thread; waits for them with a deadline.
class AckBox {
 public:
  rpc::SessionRuntime::AckCallback Callback() {
    return [this](const v1::Ack& ack) {
      std::lock_guard<std::mutex> lock(mu_);
      acks_.push_back(ack);
      cv_.notify_all();
    };
  }
  bool WaitFor(size_t n) {
    std::unique_lock<std::mutex> lock(mu_);
    return cv_.wait_for(lock, std::chrono::seconds(30), [&] { return acks_.size() >= n; });
  }
  std::vector<v1::Ack> acks() {
    std::lock_guard<std::mutex> lock(mu_);
    return acks_;
  }

 private:
  std::mutex mu_;
  std::condition_variable cv_;
  std::vector<v1::Ack> acks_;  // GUARDED_BY(mu_)
};

v1::Record HubFeedback(uint64_t cseq, int64_t event_ns) {
  v1::Record r;
  r.set_written_session_ns(event_ns);
  v1::Feedback* f = r.mutable_feedback();
  f->set_client_id("pad-1");
  f->set_client_sequence(cseq);
  f->set_trainer("ava");
  f->set_value(1.0);
  f->set_event_session_ns(event_ns);
  f->set_arrival_session_ns(event_ns);
  return r;
}

// A SQLite ledger in a temp folder, `Wrapper` around it, and a hub on top.
template <typename Wrapper>
class Fixture {
 public:
  Fixture() {
    ledger::SqliteLedger::Options lo;
    lo.path = dir_.path() + "/tickmark.db";
    auto opened = ledger::SqliteLedger::Open(lo);
    EXPECT_TRUE(opened.ok()) << opened.status().message();
    sqlite_ = std::move(*opened);
    wrapper_ = std::make_unique<Wrapper>(sqlite_.get());
    hub_ = std::make_unique<rpc::SessionHub>(wrapper_.get(), &mono_, &rpc::SystemUtcNowNanos,
                                             rpc::SessionHub::Options{});
    auto created = hub_->Create("hub test", "");
    EXPECT_TRUE(created.ok()) << created.status().message();
    runtime_ = *created;
  }
  ~Fixture() {
    sqlite_->Flush().IgnoreError();
    sqlite_->Close();
  }
  Wrapper& ledger() { return *wrapper_; }
  rpc::SessionRuntime& runtime() { return *runtime_; }
  // Stored feedback records with this client sequence.
  size_t StoredCopies(uint64_t cseq) {
    EXPECT_TRUE(sqlite_->Flush().ok());
    auto all = sqlite_->Read(runtime_->id(), 1, 100000);
    EXPECT_TRUE(all.ok());
    size_t n = 0;
    for (const v1::Record& r : *all) {
      if (r.has_feedback() && r.feedback().client_sequence() == cseq) ++n;
    }
    return n;
  }

 private:
  TempDir dir_;
  FakeMonotonic mono_;
  std::unique_ptr<ledger::SqliteLedger> sqlite_;
  std::unique_ptr<Wrapper> wrapper_;
  std::unique_ptr<rpc::SessionHub> hub_;
  std::shared_ptr<rpc::SessionRuntime> runtime_;
};

// Runs `f` on its own thread; a deadlock ends the test binary with a message
// instead of hanging it.
void RunOrAbort(std::function<void()> f) {
  auto done = std::make_shared<std::promise<void>>();
  std::future<void> finished = done->get_future();
  std::thread([f, done] {
    f();
    done->set_value();
  }).detach();
  if (finished.wait_for(std::chrono::seconds(60)) != std::future_status::ready) {
    std::fprintf(stderr, "AppendClientRecord deadlocked\n");
    std::abort();
  }
}

TEST(SessionHubTest, ACommitCallbackOnTheCallersThreadAnswersOnceWithoutDeadlock) {
  Fixture<FaultLedger> fx;
  fx.ledger().SetFault(Mode::kCallbackOnCaller, Mode::kCallbackOnCaller);
  AckBox box;
  RunOrAbort([&] { fx.runtime().AppendClientRecord(HubFeedback(1, 10), box.Callback()); });
  ASSERT_TRUE(box.WaitFor(1));
  fx.ledger().Clear();
  ASSERT_TRUE(fx.ledger().Flush().ok());
  const auto acks = box.acks();
  ASSERT_EQ(acks.size(), 1u);  // the callback and the returned error: one ack
  EXPECT_EQ(acks[0].code(), static_cast<int32_t>(absl::StatusCode::kResourceExhausted));
  EXPECT_FALSE(acks[0].duplicate());
}

TEST(SessionHubTest, AFailedKeyIsReleasedSoTheResendIsStoredOnce) {
  for (Mode mode : {Mode::kFailFast, Mode::kCallbackOnCaller}) {
    Fixture<FaultLedger> fx;
    fx.ledger().SetFault(mode, mode);
    AckBox failed;
    RunOrAbort([&] { fx.runtime().AppendClientRecord(HubFeedback(1, 10), failed.Callback()); });
    ASSERT_TRUE(failed.WaitFor(1));
    EXPECT_NE(failed.acks()[0].code(), 0);
    fx.ledger().Clear();
    AckBox stored;
    fx.runtime().AppendClientRecord(HubFeedback(1, 10), stored.Callback());
    ASSERT_TRUE(stored.WaitFor(1));
    const v1::Ack ack = stored.acks()[0];
    EXPECT_EQ(ack.code(), 0) << ack.message();
    EXPECT_FALSE(ack.duplicate());
    EXPECT_GT(ack.sequence(), 0u);
    EXPECT_EQ(fx.StoredCopies(1), 1u);
    EXPECT_EQ(failed.acks().size(), 1u);
  }
}

TEST(SessionHubTest, ACopySentWhileTheOriginalIsInFlightIsADuplicateWithTheCommittedSequence) {
  Fixture<HoldingLedger> fx;
  AckBox original, copy;
  fx.runtime().AppendClientRecord(HubFeedback(7, 10), original.Callback());
  fx.runtime().AppendClientRecord(HubFeedback(7, 10), copy.Callback());
  ASSERT_TRUE(fx.ledger().Release(1));
  ASSERT_TRUE(original.WaitFor(1));
  ASSERT_TRUE(copy.WaitFor(1));
  const v1::Ack a = original.acks()[0];
  const v1::Ack b = copy.acks()[0];
  EXPECT_EQ(a.code(), 0) << a.message();
  EXPECT_FALSE(a.duplicate());
  EXPECT_EQ(b.code(), 0) << b.message();
  EXPECT_TRUE(b.duplicate());
  // Both carry the committed sequence, not the provisional one.
  EXPECT_LT(a.sequence(), HoldingLedger::kProvisionalOffset);
  EXPECT_EQ(b.sequence(), a.sequence());
  EXPECT_EQ(fx.ledger().client_appends(), 1u);
  EXPECT_EQ(fx.StoredCopies(7), 1u);
}

TEST(SessionHubTest, CopiesSentConcurrentlyAreStoredOnceAndAnsweredOnceEach) {
  Fixture<HoldingLedger> fx;
  constexpr int kCopies = 8;
  AckBox box;
  std::vector<std::thread> senders;
  for (int i = 0; i < kCopies; ++i) {
    senders.emplace_back([&] { fx.runtime().AppendClientRecord(HubFeedback(3, 10), box.Callback()); });
  }
  for (auto& t : senders) t.join();
  ASSERT_TRUE(fx.ledger().Release(1));
  ASSERT_TRUE(box.WaitFor(kCopies));
  ASSERT_TRUE(fx.ledger().Flush().ok());
  const auto acks = box.acks();
  ASSERT_EQ(acks.size(), static_cast<size_t>(kCopies));
  int stored = 0, duplicates = 0;
  for (const v1::Ack& a : acks) {
    EXPECT_EQ(a.code(), 0) << a.message();
    EXPECT_EQ(a.sequence(), acks[0].sequence());
    EXPECT_LT(a.sequence(), HoldingLedger::kProvisionalOffset);
    (a.duplicate() ? duplicates : stored)++;
  }
  EXPECT_EQ(stored, 1);
  EXPECT_EQ(duplicates, kCopies - 1);
  EXPECT_EQ(fx.StoredCopies(3), 1u);
}

TEST(SessionHubTest, AResendOfACommittedRecordIsADuplicateWithItsSequence) {
  Fixture<FaultLedger> fx;
  AckBox first, again;
  fx.runtime().AppendClientRecord(HubFeedback(2, 10), first.Callback());
  ASSERT_TRUE(first.WaitFor(1));
  fx.runtime().AppendClientRecord(HubFeedback(2, 10), again.Callback());
  ASSERT_TRUE(again.WaitFor(1));
  EXPECT_FALSE(first.acks()[0].duplicate());
  EXPECT_TRUE(again.acks()[0].duplicate());
  EXPECT_EQ(again.acks()[0].sequence(), first.acks()[0].sequence());
  EXPECT_EQ(fx.StoredCopies(2), 1u);
  auto last = fx.runtime().LastClientSequence("pad-1");
  ASSERT_TRUE(last.ok());
  EXPECT_EQ(*last, 2u);
}

}  // namespace
}  // namespace tickmark::testing

// StreamClient against FakeLive (fake_live.h): exactly-once effect across
// forced disconnects, rejections never resent, probes answered on the
// injected clock, permanent hello errors stop reconnecting.
#include "clients/common/stream_client.h"

#include <atomic>
#include <chrono>
#include <map>
#include <mutex>
#include <string>
#include <vector>

#include "gtest/gtest.h"
#include "tests/clients/fake_live.h"

namespace tickmark::client {
namespace {

using std::chrono::seconds;
using std::chrono::steady_clock;
using tickmark::testing::FakeLive;

// A client clock that moves forward 1 µs every time it is read, so that
// successive stamps differ without any real waiting.
class TickingClock final : public MonotonicSource {
 public:
  explicit TickingClock(int64_t start) : now_(start) {}
  int64_t NowNanos() const override { return now_.fetch_add(1000); }

 private:
  mutable std::atomic<int64_t> now_;
};

StreamOptions Options(const std::string& target, const std::string& id,
                      const MonotonicSource* clock = nullptr) {
  StreamOptions o;
  o.target = target;
  o.token = "tm_test_token";
  o.client_id = id;
  o.source = {tickmark::v1::SOURCE_KIND_SCRIPT, "test", "stream_client_test"};
  o.credentials = grpc::InsecureChannelCredentials();
  o.clock = clock;
  // Short waits keep the test quick; the logic is the same as with 100 ms.
  o.initial_backoff = Duration::Millis(1);
  o.max_backoff = Duration::Millis(20);
  return o;
}

tickmark::v1::FeedbackMessage Feedback(double value, int64_t t) {
  tickmark::v1::FeedbackMessage f;
  f.set_value(value);
  f.set_event_source_ns(t);
  f.set_input("test");
  return f;
}

steady_clock::time_point In(seconds s) { return steady_clock::now() + s; }

// Records what the callbacks saw, per client sequence.
struct Seen {
  std::mutex mu;
  std::map<uint64_t, int> acks;
  std::map<uint64_t, int> rejects;
  std::vector<absl::StatusCode> reject_codes;

  TrainerClient::Callbacks Callbacks() {
    TrainerClient::Callbacks cb;
    cb.on_ack = [this](const AckInfo& a, const tickmark::v1::FeedbackMessage& f) {
      std::lock_guard<std::mutex> l(mu);
      EXPECT_EQ(a.client_sequence, f.client_sequence());
      ++acks[a.client_sequence];
    };
    cb.on_rejected = [this](uint64_t seq, const tickmark::v1::FeedbackMessage&,
                            const absl::Status& s) {
      std::lock_guard<std::mutex> l(mu);
      ++rejects[seq];
      reject_codes.push_back(s.code());
    };
    return cb;
  }
};

TEST(StreamClientTest, EveryMessageStoredAndAckedOnceAcrossDrops) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) {
    s.drop_after = 4;  // each stream ends after its 4th message...
    s.max_drops = 6;
    s.store_before_drop = true;  // ...stored but never acknowledged
  });
  Seen seen;
  TrainerClient client;
  ASSERT_TRUE(client.Connect(Options(target, "host:test:drops"), seen.Callbacks()).ok());
  constexpr int kMessages = 30;
  for (int i = 0; i < kMessages; ++i) {
    ASSERT_TRUE(client.Send(Feedback(i % 2 ? 1.0 : -1.0, i)).ok());
  }
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());

  EXPECT_EQ(fake.drops(), 6);
  const auto stored = fake.stored();
  ASSERT_EQ(stored.size(), static_cast<size_t>(kMessages));
  for (uint64_t seq = 1; seq <= kMessages; ++seq) {
    EXPECT_EQ(stored.count({"host:test:drops", seq}), 1u) << seq;
  }
  // Resends happened (each drop stored one message without acking it), yet
  // the client saw each sequence acknowledged exactly once.
  int receptions = 0;
  for (const auto& [key, n] : fake.received()) receptions += n;
  EXPECT_GT(receptions, kMessages);
  std::lock_guard<std::mutex> l(seen.mu);
  ASSERT_EQ(seen.acks.size(), static_cast<size_t>(kMessages));
  for (const auto& [seq, n] : seen.acks) EXPECT_EQ(n, 1) << seq;
  // Resent in order: the store order is the sequence order.
  const auto order = fake.store_order();
  for (size_t i = 1; i < order.size(); ++i) EXPECT_LT(order[i - 1], order[i]);
  const StreamStatus st = client.status();
  EXPECT_EQ(st.acked, static_cast<uint64_t>(kMessages));
  EXPECT_EQ(st.pending, 0u);
  EXPECT_GE(st.reconnects, 6u);
  EXPECT_EQ(st.state, StreamState::kClosed);
}

TEST(StreamClientTest, RejectedMessageIsReportedAndNotResent) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) {
    s.reject = {3};
    s.drop_after = 5;  // the 5th message is lost with the stream → resent
    s.max_drops = 1;
    s.store_before_drop = false;
  });
  Seen seen;
  TrainerClient client;
  ASSERT_TRUE(client.Connect(Options(target, "host:test:reject"), seen.Callbacks()).ok());
  for (int i = 0; i < 6; ++i) ASSERT_TRUE(client.Send(Feedback(1.0, i)).ok());
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());

  EXPECT_EQ(fake.drops(), 1);
  const auto received = fake.received();
  EXPECT_EQ(received.at({"host:test:reject", 3}), 1);  // never resent
  EXPECT_EQ(received.at({"host:test:reject", 5}), 2);  // lost once, resent
  EXPECT_EQ(fake.stored().count({"host:test:reject", 3}), 0u);
  std::lock_guard<std::mutex> l(seen.mu);
  EXPECT_EQ(seen.rejects.size(), 1u);
  EXPECT_EQ(seen.rejects[3], 1);
  ASSERT_EQ(seen.reject_codes.size(), 1u);
  EXPECT_EQ(seen.reject_codes[0], absl::StatusCode::kInvalidArgument);
  EXPECT_EQ(seen.acks.size(), 5u);
  const StreamStatus st = client.status();
  EXPECT_EQ(st.rejected, 1u);
  EXPECT_EQ(st.acked, 5u);
}

// Regression: an UNAVAILABLE Ack (the server's disk was full, nothing
// stored) was handed to on_rejected and the feedback dropped. It is kept and
// sent again after a reconnect, and only stored once.
TEST(StreamClientTest, UnavailableAckIsKeptAndResentAfterAReconnect) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) { s.unavailable_once = {2, 4}; });
  Seen seen;
  TrainerClient client;
  ASSERT_TRUE(client.Connect(Options(target, "host:test:unavailable"), seen.Callbacks()).ok());
  for (int i = 0; i < 5; ++i) ASSERT_TRUE(client.Send(Feedback(1.0, i)).ok());
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());

  const auto received = fake.received();
  EXPECT_GE(received.at({"host:test:unavailable", 2}), 2);  // refused once, sent again
  EXPECT_GE(received.at({"host:test:unavailable", 4}), 2);
  for (uint64_t seq = 1; seq <= 5; ++seq) {
    EXPECT_EQ(fake.stored().count({"host:test:unavailable", seq}), 1u) << seq;
  }
  std::lock_guard<std::mutex> l(seen.mu);
  EXPECT_TRUE(seen.rejects.empty());
  const StreamStatus st = client.status();
  EXPECT_EQ(st.rejected, 0u);
  EXPECT_EQ(st.pending, 0u);
  EXPECT_GE(st.reconnects, 1u);
}

TEST(StreamClientTest, ProbesAnsweredOnInjectedClock) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) { s.probes_per_stream = 3; });
  TickingClock clock(5'000'000'000);
  TrainerClient client;
  ASSERT_TRUE(client.Connect(Options(target, "host:test:probe", &clock)).ok());
  ASSERT_TRUE(fake.WaitFor([&] { return fake.probes_locked().size() >= 3; }));
  const auto probes = fake.probes();
  ASSERT_EQ(probes.size(), 3u);
  for (size_t i = 0; i < probes.size(); ++i) {
    const auto& r = probes[i].reply;
    EXPECT_EQ(r.probe_id(), i + 1);  // echoed
    EXPECT_EQ(r.t1_session_ns(), 1'700'000'000'000'000'000 + static_cast<int64_t>(i));
    // RFC 5905 §8: the responder's receive stamp precedes its transmit stamp
    // (on one clock), so T3 − T2, the hold time, is never negative.
    EXPECT_LE(r.t2_client_ns(), r.t3_client_ns());
    // Same clock as the Hello (and event times): later than the hello stamp.
    EXPECT_GT(r.t2_client_ns(), probes[i].hello_sent_client_ns);
    EXPECT_GE(probes[i].hello_sent_client_ns, 5'000'000'000);
  }
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());
  EXPECT_EQ(client.status().probes_answered, 3u);
}

class PermanentHelloErrorTest : public ::testing::TestWithParam<grpc::StatusCode> {};

TEST_P(PermanentHelloErrorTest, StopsReconnectingAndReports) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([&](FakeLive::Script& s) {
    s.hello_error = grpc::Status(GetParam(), "refused by script");
  });
  TrainerClient client;
  std::atomic<int> failed_calls{0};
  TrainerClient::Callbacks cb;
  cb.on_state = [&](const StreamStatus& s) {
    if (s.state == StreamState::kFailed) ++failed_calls;
  };
  ASSERT_TRUE(client.Connect(Options(target, "host:test:refused"), cb).ok());
  ASSERT_TRUE(client.Send(Feedback(1.0, 1)).ok());
  const absl::Status flushed = client.Flush(In(seconds(30)));
  EXPECT_EQ(static_cast<int>(flushed.code()), static_cast<int>(GetParam()));
  const StreamStatus st = client.status();
  EXPECT_EQ(st.state, StreamState::kFailed);
  EXPECT_EQ(static_cast<int>(st.last_error.code()), static_cast<int>(GetParam()));
  EXPECT_EQ(st.pending, 1u);  // kept, not silently dropped
  EXPECT_FALSE(client.Send(Feedback(1.0, 2)).ok());
  // Close joins the worker, so no attempt can follow the count below.
  EXPECT_EQ(static_cast<int>(client.Close(In(seconds(10))).code()),
            static_cast<int>(GetParam()));
  EXPECT_EQ(fake.hellos(), 1);
  EXPECT_EQ(client.status().reconnects, 0u);
  EXPECT_EQ(failed_calls.load(), 1);
}

// The codes the proto comments name for a refused hello (stream.proto).
INSTANTIATE_TEST_SUITE_P(
    Codes, PermanentHelloErrorTest,
    ::testing::Values(grpc::StatusCode::UNAUTHENTICATED,
                      grpc::StatusCode::PERMISSION_DENIED,
                      grpc::StatusCode::NOT_FOUND,
                      grpc::StatusCode::FAILED_PRECONDITION,
                      grpc::StatusCode::INVALID_ARGUMENT));

TEST(StreamClientTest, TransientHelloErrorsAreRetried) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) { s.transient_hello_failures = 2; });
  TrainerClient client;
  ASSERT_TRUE(client.Connect(Options(target, "host:test:transient")).ok());
  ASSERT_TRUE(client.Send(Feedback(-1.0, 1)).ok());
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());
  EXPECT_EQ(fake.hellos(), 3);
  EXPECT_EQ(client.status().reconnects, 2u);
  EXPECT_EQ(client.status().connections, 1u);
}

// Regression: a server that accepted the stream but never sent a Welcome
// held the client in its first Read forever. Now each such attempt ends
// after hello_timeout and the next one follows, and what was not
// acknowledged before is resent once a server welcomes the client.
TEST(StreamClientTest, ServerThatNeverWelcomesIsRetriedAfterHelloTimeout) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) {
    s.silent_hellos = {1, 3};  // the first attempt and the one after the drop
    s.drop_after = 3;          // the first welcomed stream ends at message 3,
    s.max_drops = 1;
    s.store_before_drop = false;  // which is neither stored nor acknowledged
  });
  Seen seen;
  TrainerClient client;
  StreamOptions options = Options(target, "host:test:silent");
  options.hello_timeout = Duration::Millis(200);
  ASSERT_TRUE(client.Connect(options, seen.Callbacks()).ok());
  constexpr int kMessages = 5;
  for (int i = 0; i < kMessages; ++i) ASSERT_TRUE(client.Send(Feedback(1.0, i)).ok());
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());

  EXPECT_EQ(fake.hellos(), 4);
  EXPECT_EQ(fake.drops(), 1);
  const auto stored = fake.stored();
  ASSERT_EQ(stored.size(), static_cast<size_t>(kMessages));
  for (uint64_t seq = 1; seq <= kMessages; ++seq) {
    EXPECT_EQ(stored.count({"host:test:silent", seq}), 1u) << seq;
  }
  std::lock_guard<std::mutex> l(seen.mu);
  EXPECT_EQ(seen.acks.size(), static_cast<size_t>(kMessages));
  const StreamStatus st = client.status();
  EXPECT_EQ(st.connections, 2u);
  EXPECT_EQ(st.reconnects, 3u);
  EXPECT_EQ(st.last_error.code(), absl::StatusCode::kDeadlineExceeded) << st.last_error;
}

// A hello timeout of zero keeps the old behaviour: the attempt waits until
// the server answers or the client is closed, and Close ends it.
TEST(StreamClientTest, ZeroHelloTimeoutWaitsUntilClosed) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) { s.silent_hellos = {1}; });
  TrainerClient client;
  StreamOptions options = Options(target, "host:test:nolimit");
  options.hello_timeout = Duration::Zero();
  ASSERT_TRUE(client.Connect(options).ok());
  ASSERT_TRUE(fake.WaitFor([&] { return fake.hellos_locked() >= 1; }));
  EXPECT_EQ(client.status().state, StreamState::kConnecting);
  EXPECT_TRUE(client.Close(In(seconds(10))).ok());
  EXPECT_EQ(fake.hellos(), 1);
}

// A restarted program with the same stable id must continue above what the
// server holds, or its new messages would be taken for duplicates.
TEST(StreamClientTest, RestartContinuesAboveServerSequence) {
  FakeLive fake;
  const std::string target = fake.Start();
  {
    TrainerClient first;
    ASSERT_TRUE(first.Connect(Options(target, "host:test:restart")).ok());
    for (int i = 0; i < 3; ++i) ASSERT_TRUE(first.Send(Feedback(1.0, i)).ok());
    ASSERT_TRUE(first.Flush(In(seconds(30))).ok());
    ASSERT_TRUE(first.Close(In(seconds(10))).ok());
  }
  Seen seen;
  TrainerClient second;
  // Sent before any Welcome: numbered when it arrives.
  ASSERT_TRUE(second.Connect(Options(target, "host:test:restart"), seen.Callbacks()).ok());
  for (int i = 0; i < 2; ++i) ASSERT_TRUE(second.Send(Feedback(-1.0, i)).ok());
  ASSERT_TRUE(second.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(second.Close(In(seconds(10))).ok());
  EXPECT_EQ(fake.stored().size(), 5u);
  std::lock_guard<std::mutex> l(seen.mu);
  EXPECT_EQ(seen.acks.count(4), 1u);
  EXPECT_EQ(seen.acks.count(5), 1u);
}

// Two programs sharing one client id would each take the other's messages
// for duplicates; a Welcome above anything this client numbered shows it.
TEST(StreamClientTest, ForeignWriterOfSameClientIdStopsClient) {
  FakeLive fake;
  const std::string target = fake.Start();
  TrainerClient client;
  ASSERT_TRUE(client.Connect(Options(target, "host:test:shared")).ok());
  ASSERT_TRUE(client.Send(Feedback(1.0, 1)).ok());
  ASSERT_TRUE(client.Send(Feedback(1.0, 2)).ok());
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());
  fake.Edit([](FakeLive::Script& s) {
    s.welcome_extra = 100;
    s.drop_after = 1;  // the next message ends the stream unstored
    s.max_drops = 1;
    s.store_before_drop = false;
  });
  ASSERT_TRUE(client.Send(Feedback(1.0, 3)).ok());
  const absl::Status flushed = client.Flush(In(seconds(30)));
  EXPECT_EQ(flushed.code(), absl::StatusCode::kFailedPrecondition) << flushed;
  EXPECT_EQ(client.status().state, StreamState::kFailed);
  EXPECT_EQ(client.status().pending, 1u);
  EXPECT_EQ(fake.stored().size(), 2u);
}

TEST(StreamClientTest, CloseHalfClosesAfterWritingQueue) {
  FakeLive fake;
  const std::string target = fake.Start();
  TrainerClient client;
  ASSERT_TRUE(client.Connect(Options(target, "host:test:close")).ok());
  ASSERT_TRUE(client.Send(Feedback(1.0, 1)).ok());
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());  // connected for sure
  ASSERT_TRUE(client.Send(Feedback(1.0, 2)).ok());
  ASSERT_TRUE(client.Send(Feedback(1.0, 3)).ok());
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());
  EXPECT_EQ(fake.half_closes(), 1);  // the server saw the end of writes
  EXPECT_EQ(fake.stored().size(), 3u);
  EXPECT_EQ(client.status().acked, 3u);
  EXPECT_EQ(client.status().state, StreamState::kClosed);
  EXPECT_FALSE(client.Send(Feedback(1.0, 4)).ok());
}

TEST(StreamClientTest, AgentStreamDeliversSteps) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) {
    s.drop_after = 2;
    s.max_drops = 2;
  });
  AgentClient client;
  ASSERT_TRUE(client.Connect(Options(target, "host:test:agent")).ok());
  for (uint64_t i = 0; i < 5; ++i) {
    tickmark::v1::StepMessage step;
    step.set_step_id(i);
    step.set_start_agent_ns(static_cast<int64_t>(i) * 100'000'000);
    step.set_action(i % 2 ? "north" : "wait");  // dock rover actions (docs/architecture.md §8)
    ASSERT_TRUE(client.Send(step).ok());
  }
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());
  EXPECT_EQ(fake.stored().size(), 5u);
  EXPECT_EQ(client.status().acked, 5u);
}

// Disciplined clocks (docs/time-model.md): the client adds its real-time
// reading at the event, and the kernel's bound, only while its kernel says
// synchronised (adjtimex(2): STA_UNSYNC clear), never over a reading the
// caller set, and never with send_realtime off.
TEST(StreamClientTest, SendsItsRealtimeReadingOnlyWhileTheKernelSaysSynchronised) {
  FakeLive fake;
  const std::string target = fake.Start();
  const FakeMonotonic clock(10'000'000'000);                // the event clock
  const FakeMonotonic realtime(1'700'000'000'000'000'000);  // its CLOCK_REALTIME
  FakeDiscipline discipline(&realtime);
  discipline.SetSynced(Duration::Micros(800));
  TrainerClient client;
  StreamOptions o = Options(target, "host:test:realtime", &clock);
  o.discipline = &discipline;
  ASSERT_TRUE(client.Connect(o).ok());
  ASSERT_TRUE(client.Send(Feedback(1, 9'000'000'000)).ok());  // 1 s before "now"
  discipline.SetUnsynced();
  ASSERT_TRUE(client.Send(Feedback(-1, 9'500'000'000)).ok());
  discipline.SetSynced(Duration::Micros(800));
  tickmark::v1::FeedbackMessage own = Feedback(1, 9'600'000'000);
  own.set_event_realtime_ns(1'600'000'000'000'000'000);  // the caller's own reading
  own.set_realtime_bound_ns(5'000'000);
  own.set_realtime_synced(true);
  ASSERT_TRUE(client.Send(own).ok());
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());

  TrainerClient off;
  StreamOptions o2 = Options(target, "host:test:realtime-off", &clock);
  o2.discipline = &discipline;
  o2.send_realtime = false;
  ASSERT_TRUE(off.Connect(o2).ok());
  ASSERT_TRUE(off.Send(Feedback(1, 9'000'000'000)).ok());
  ASSERT_TRUE(off.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(off.Close(In(seconds(10))).ok());

  const auto bodies = fake.bodies();
  auto feedback = [&](const std::string& id, uint64_t seq) {
    tickmark::v1::TrainerMessage m;
    EXPECT_TRUE(m.ParseFromString(bodies.at({id, seq})));
    return m.feedback();
  };
  const auto synced = feedback("host:test:realtime", 1);
  EXPECT_EQ(synced.event_realtime_ns(), 1'700'000'000'000'000'000 - 1'000'000'000);
  EXPECT_EQ(synced.realtime_bound_ns(), 800'000);
  EXPECT_TRUE(synced.realtime_synced());
  const auto unsynced = feedback("host:test:realtime", 2);
  EXPECT_EQ(unsynced.event_realtime_ns(), 0);
  EXPECT_EQ(unsynced.realtime_bound_ns(), 0);
  EXPECT_FALSE(unsynced.realtime_synced());
  const auto kept = feedback("host:test:realtime", 3);
  EXPECT_EQ(kept.event_realtime_ns(), 1'600'000'000'000'000'000);
  EXPECT_EQ(kept.realtime_bound_ns(), 5'000'000);
  EXPECT_EQ(feedback("host:test:realtime-off", 1).event_realtime_ns(), 0);

  // Steps carry it as start_realtime_ns.
  AgentClient agent;
  StreamOptions o3 = Options(target, "host:test:realtime-agent", &clock);
  o3.discipline = &discipline;
  ASSERT_TRUE(agent.Connect(o3).ok());
  tickmark::v1::StepMessage step;
  step.set_step_id(1);
  step.set_start_agent_ns(9'750'000'000);
  step.set_action("north");  // dock rover actions (docs/architecture.md §8)
  ASSERT_TRUE(agent.Send(step).ok());
  ASSERT_TRUE(agent.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(agent.Close(In(seconds(10))).ok());
  tickmark::v1::AgentMessage am;
  ASSERT_TRUE(am.ParseFromString(fake.bodies().at({"host:test:realtime-agent", 1})));
  EXPECT_EQ(am.step().start_realtime_ns(), 1'700'000'000'000'000'000 - 250'000'000);
  EXPECT_EQ(am.step().realtime_bound_ns(), 800'000);
  EXPECT_TRUE(am.step().realtime_synced());
}

// Calibration messages share the feedback's client sequences and resend
// queue; the fitted Calibration reaches on_server_message before the
// finish's acknowledgement (stream.proto, CalibrationMessage).
TEST(StreamClientTest, CalibrationMessagesShareSequencesAndResultPrecedesFinishAck) {
  FakeLive fake;
  const std::string target = fake.Start();
  fake.Edit([](FakeLive::Script& s) {
    s.drop_after = 2;  // one resend of the second message on the way
    s.max_drops = 1;
    s.calibration.set_id("c-0000test");
    s.calibration.set_valid(3);
  });
  std::mutex mu;
  std::vector<std::string> events;  // in callback order
  TrainerClient::Callbacks cb;
  cb.on_ack = [&](const AckInfo& a, const tickmark::v1::FeedbackMessage&) {
    std::lock_guard<std::mutex> l(mu);
    events.push_back("feedback-ack " + std::to_string(a.client_sequence));
  };
  cb.on_request_ack = [&](const AckInfo& a, const tickmark::v1::TrainerMessage& m) {
    std::lock_guard<std::mutex> l(mu);
    EXPECT_TRUE(m.has_calibration());
    EXPECT_EQ(m.calibration().client_sequence(), a.client_sequence);
    events.push_back("calibration-ack " + std::to_string(a.client_sequence));
  };
  cb.on_server_message = [&](const tickmark::v1::ServerMessage& m) {
    std::lock_guard<std::mutex> l(mu);
    ASSERT_TRUE(m.has_calibration());
    events.push_back("result " + m.calibration().id() + " " + m.calibration().run());
  };
  TrainerClient client;
  ASSERT_TRUE(client.Connect(Options(target, "host:test:calibration"), cb).ok());
  tickmark::v1::TrainerMessage hello;
  hello.mutable_hello()->set_client_id("x");
  EXPECT_EQ(client.SendRequest(hello).code(), absl::StatusCode::kInvalidArgument);

  ASSERT_TRUE(client.Send(Feedback(1.0, 1)).ok());
  tickmark::v1::TrainerMessage move;
  move.mutable_calibration()->set_run("cal-1");
  move.mutable_calibration()->mutable_move()->set_move(1);
  ASSERT_TRUE(client.SendRequest(move).ok());
  tickmark::v1::TrainerMessage answer;
  answer.mutable_calibration()->set_run("cal-1");
  answer.mutable_calibration()->mutable_answer()->set_approve(true);
  ASSERT_TRUE(client.SendRequest(answer).ok());
  tickmark::v1::TrainerMessage finish;
  finish.mutable_calibration()->set_run("cal-1");
  finish.mutable_calibration()->mutable_finish()->set_min_answers(3);
  ASSERT_TRUE(client.SendRequest(finish).ok());
  ASSERT_TRUE(client.Flush(In(seconds(30))).ok());
  ASSERT_TRUE(client.Close(In(seconds(10))).ok());

  const auto stored = fake.stored();
  ASSERT_EQ(stored.size(), 4u);
  for (uint64_t seq = 1; seq <= 4; ++seq) {
    EXPECT_EQ(stored.count({"host:test:calibration", seq}), 1u) << seq;
  }
  std::lock_guard<std::mutex> l(mu);
  EXPECT_EQ(events, (std::vector<std::string>{"feedback-ack 1", "calibration-ack 2",
                                              "calibration-ack 3", "result c-0000test cal-1",
                                              "calibration-ack 4"}));
}

TEST(StreamClientTest, ConnectRejectsBadOptions) {
  TrainerClient client;
  StreamOptions o = Options("127.0.0.1:1", "bad id with spaces");
  EXPECT_EQ(client.Connect(o).code(), absl::StatusCode::kInvalidArgument);
  o = Options("127.0.0.1:1", "ok-id");
  o.token.clear();
  EXPECT_EQ(client.Connect(o).code(), absl::StatusCode::kInvalidArgument);
}

}  // namespace
}  // namespace tickmark::client

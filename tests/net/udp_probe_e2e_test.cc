// The UDP probe port end to end: an in-process tickmarkd (127.0.0.1:0, temp
// folder) with the port on, a TrainerClient whose clock is 3.2 s ahead. Its
// UDP probes reach the stream's clock model (Probe records with transport
// "udp", model updates counting them) and its feedback lands within the
// stated uncertainty. With the port off the Welcome offers none and nothing
// travels over UDP.
#include <gtest/gtest.h>

#include <chrono>
#include <memory>
#include <string>
#include <thread>
#include <vector>

#include "clients/common/stream_client.h"
#include "server/rpc/server.h"
#include "tests/rpc/test_server.h"

namespace tickmark {
namespace {

namespace v1 = tickmark::v1;
using std::chrono::steady_clock;
using testing::MonoNowNs;
using testing::TempDir;

constexpr int64_t kClientAheadNs = 3'200'000'000;  // docs/architecture.md §8's dock rover scenario

// A client clock 3.2 s ahead of this process's CLOCK_MONOTONIC (which the
// server's session time also advances with).
class AheadClock final : public MonotonicSource {
 public:
  int64_t NowNanos() const override { return MonoNowNs() + kClientAheadNs; }
};

// Waits for `done` with a deadline, polling (no fixed sleep decides a result).
template <typename F>
bool WaitFor(F done, std::chrono::seconds limit = std::chrono::seconds(20)) {
  const auto deadline = steady_clock::now() + limit;
  while (!done()) {
    if (steady_clock::now() > deadline) return false;
    std::this_thread::sleep_for(std::chrono::milliseconds(5));
  }
  return true;
}

class UdpProbeE2e : public ::testing::Test {
 protected:
  void StartServer(bool udp) {
    rpc::ServerOptions o;
    o.listen = "127.0.0.1:0";
    o.data_dir = dir_.path();
    o.udp_probe = udp;
    o.udp_probe_port = 0;
    // One stream probe, then none for the test's life: what the model holds
    // beyond one sample came over UDP.
    o.live.probe_burst = 1;
    o.live.probe_interval = Duration::Seconds(3600);
    o.live.probing.adaptive = false;
    auto s = rpc::TickmarkServer::Start(o);
    ASSERT_TRUE(s.ok()) << s.status().message();
    server_ = std::move(*s);
    target_ = "127.0.0.1:" + std::to_string(server_->port());
    std::ifstream in(server_->operator_token_path());
    std::getline(in, operator_token_);
    channel_ = grpc::CreateChannel(target_, grpc::InsecureChannelCredentials());
    admin_ = v1::SessionAdmin::NewStub(channel_);
    live_ = v1::Live::NewStub(channel_);

    v1::CreateSessionRequest create;
    create.set_title("dock rover udp probes");
    v1::CreateSessionResponse session;
    auto ctx = Context(operator_token_);
    ASSERT_TRUE(admin_->CreateSession(ctx.get(), create, &session).ok());
    session_ = session.session().id();
    v1::IssueTokenRequest issue;
    issue.set_session_id(session_);
    issue.set_role(v1::ROLE_TRAINER);
    issue.set_subject("trainer-1");
    v1::IssueTokenResponse token;
    ctx = Context(operator_token_);
    ASSERT_TRUE(admin_->IssueToken(ctx.get(), issue, &token).ok());
    trainer_token_ = token.secret();
  }

  std::unique_ptr<grpc::ClientContext> Context(const std::string& token) {
    auto ctx = std::make_unique<grpc::ClientContext>();
    ctx->AddMetadata("authorization", "Bearer " + token);
    ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(20));
    return ctx;
  }

  // The Welcome a bare trainer stream gets.
  v1::Welcome RawWelcome(const std::string& client_id) {
    auto ctx = Context(trainer_token_);
    auto rw = live_->Train(ctx.get());
    v1::TrainerMessage hello;
    hello.mutable_hello()->set_client_id(client_id);
    hello.mutable_hello()->set_sent_client_ns(MonoNowNs());
    EXPECT_TRUE(rw->Write(hello));
    v1::ServerMessage m;
    while (rw->Read(&m) && !m.has_welcome()) {
    }
    ctx->TryCancel();
    rw->Finish();
    return m.welcome();
  }

  std::vector<v1::Record> Ledger(v1::RecordKind kind) {
    v1::SubscribeRequest req;
    req.set_session_id(session_);
    req.set_stop_at_end(true);
    req.add_kinds(kind);
    auto ctx = Context(operator_token_);
    auto reader = live_->Subscribe(ctx.get(), req);
    std::vector<v1::Record> out;
    v1::Record r;
    while (reader->Read(&r)) out.push_back(r);
    EXPECT_TRUE(reader->Finish().ok());
    return out;
  }

  client::StreamOptions ClientOptions(const MonotonicSource* clock) {
    client::StreamOptions o;
    o.target = target_;
    o.token = trainer_token_;
    o.client_id = "dock-rover-keys-1";
    o.credentials = grpc::InsecureChannelCredentials();
    o.clock = clock;
    o.udp_probe_interval = Duration::Millis(20);
    return o;
  }

  TempDir dir_;
  std::unique_ptr<rpc::TickmarkServer> server_;
  std::string target_;
  std::string operator_token_;
  std::string session_;
  std::string trainer_token_;
  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<v1::SessionAdmin::Stub> admin_;
  std::unique_ptr<v1::Live::Stub> live_;
};

TEST_F(UdpProbeE2e, WelcomeOffersThePortWithAFreshTagAndKeyPerStream) {
  StartServer(true);
  ASSERT_NE(server_->udp_probe_port(), 0);
  const v1::Welcome a = RawWelcome("a");
  const v1::Welcome b = RawWelcome("b");
  EXPECT_EQ(a.udp_probe_port(), static_cast<uint32_t>(server_->udp_probe_port()));
  EXPECT_EQ(a.udp_probe_key().size(), 32u);  // HMAC-SHA256 key, 256 bits (common practice)
  EXPECT_NE(a.udp_probe_tag(), 0u);
  EXPECT_NE(a.udp_probe_tag(), b.udp_probe_tag());
  EXPECT_NE(a.udp_probe_key(), b.udp_probe_key());
}

TEST_F(UdpProbeE2e, UdpProbesFeedTheStreamsModelAndFeedbackMapsWithinItsUncertainty) {
  StartServer(true);
  AheadClock clock;
  client::TrainerClient trainer;
  ASSERT_TRUE(trainer.Connect(ClientOptions(&clock)).ok());
  // The stream probe's answer goes out before the feedback, so the ledger
  // holds it by the time the feedback is acknowledged.
  ASSERT_TRUE(WaitFor([&] {
    return trainer.status().udp_probes >= 12 && trainer.status().probes_answered >= 1;
  })) << "UDP exchanges: "
      << trainer.status().udp_probes;

  v1::FeedbackMessage f;
  f.set_value(1);
  f.set_input("key:+");
  const int64_t event_client_ns = clock.NowNanos();
  f.set_event_source_ns(event_client_ns);
  ASSERT_TRUE(trainer.Send(f).ok());
  ASSERT_TRUE(trainer.Flush(steady_clock::now() + std::chrono::seconds(20)).ok());
  const int64_t acked_client_ns = clock.NowNanos();
  {
    // The clock table of `session show` counts the UDP probes with the
    // stream's own (SessionSummary.clocks).
    v1::GetSessionRequest get;
    get.set_session_id(session_);
    v1::SessionSummary summary;
    auto ctx = Context(operator_token_);
    ASSERT_TRUE(admin_->GetSession(ctx.get(), get, &summary).ok());
    ASSERT_EQ(summary.clocks_size(), 1);
    const v1::ClientClock& c = summary.clocks(0);
    EXPECT_EQ(c.client_id(), "dock-rover-keys-1");
    EXPECT_TRUE(c.probed());
    EXPECT_GE(c.probes(), 13u);  // the stream probe and at least 12 over UDP
    EXPECT_EQ(c.rejected_probes(), 0u);
    EXPECT_LT(c.udp_probe_drops(), c.probes());
    EXPECT_LT(c.uncertainty_ns(), 50'000'000);  // loopback
  }
  ASSERT_TRUE(trainer.Close(steady_clock::now() + std::chrono::seconds(20)).ok());

  // Client clock − session time is one constant here (both advance with
  // CLOCK_MONOTONIC), and each probe's offset lies within δ/2 of it
  // (RFC 5905 §8), so any two probes agree within (δ_a + δ_b)/2.
  const std::vector<v1::Record> probes = Ledger(v1::RECORD_KIND_PROBE);
  const v1::Probe* stream_probe = nullptr;
  for (const v1::Record& r : probes) {
    if (r.probe().transport().empty() && r.probe().accepted()) stream_probe = &r.probe();
  }
  ASSERT_NE(stream_probe, nullptr);
  int udp_accepted = 0;
  for (const v1::Record& r : probes) {
    const v1::Probe& p = r.probe();
    if (p.transport() != "udp") continue;
    EXPECT_EQ(p.client_id(), "dock-rover-keys-1");
    EXPECT_TRUE(p.accepted()) << p.reject_reason();
    EXPECT_NEAR(static_cast<double>(p.offset_ns()), static_cast<double>(stream_probe->offset_ns()),
                static_cast<double>(p.delay_ns() + stream_probe->delay_ns()) / 2 + 1);
    EXPECT_LE(p.t1_session_ns(), p.t4_session_ns());
    EXPECT_LE(p.t2_client_ns(), p.t3_client_ns());
    udp_accepted += p.accepted() ? 1 : 0;
  }
  EXPECT_GE(udp_accepted, 12);
  // The one stream probe plus the UDP ones, in the same model.
  const std::vector<v1::Record> updates = Ledger(v1::RECORD_KIND_CLOCK_MODEL);
  ASSERT_FALSE(updates.empty());
  EXPECT_GE(updates.back().clock_model().samples(), 9u);  // the filter window, RFC 5905 §10: 8

  const std::vector<v1::Record> feedback = Ledger(v1::RECORD_KIND_FEEDBACK);
  ASSERT_EQ(feedback.size(), 1u);
  const v1::Feedback& fb = feedback[0].feedback();
  EXPECT_EQ(fb.event_source_ns(), event_client_ns);
  // The true session time of the event lies between the arrival minus the
  // time from stamping to the ack (measured on the same clock) and the
  // arrival; the mapped time must be within its uncertainty of that span.
  const int64_t latest = fb.arrival_session_ns();
  const int64_t earliest = latest - (acked_client_ns - event_client_ns);
  EXPECT_LE(fb.event_session_ns() - fb.uncertainty_ns(), latest);
  EXPECT_GE(fb.event_session_ns() + fb.uncertainty_ns(), earliest);
  EXPECT_LT(fb.uncertainty_ns(), 50'000'000);  // loopback: far below the 3.2 s offset
}

TEST_F(UdpProbeE2e, PortOffChangesNothing) {
  StartServer(false);
  EXPECT_EQ(server_->udp_probe_port(), 0);
  const v1::Welcome w = RawWelcome("raw");
  EXPECT_EQ(w.udp_probe_port(), 0u);
  EXPECT_EQ(w.udp_probe_tag(), 0u);
  EXPECT_TRUE(w.udp_probe_key().empty());

  AheadClock clock;
  client::TrainerClient trainer;
  ASSERT_TRUE(trainer.Connect(ClientOptions(&clock)).ok());
  ASSERT_TRUE(WaitFor([&] { return trainer.status().probes_answered >= 1; }));
  v1::FeedbackMessage f;
  f.set_value(-1);
  f.set_event_source_ns(clock.NowNanos());
  ASSERT_TRUE(trainer.Send(f).ok());
  ASSERT_TRUE(trainer.Flush(steady_clock::now() + std::chrono::seconds(20)).ok());
  ASSERT_TRUE(trainer.Close(steady_clock::now() + std::chrono::seconds(20)).ok());
  EXPECT_EQ(trainer.status().udp_probes, 0u);

  const std::vector<v1::Record> probes = Ledger(v1::RECORD_KIND_PROBE);
  EXPECT_FALSE(probes.empty());
  for (const v1::Record& r : probes) EXPECT_EQ(r.probe().transport(), "");
}

}  // namespace
}  // namespace tickmark

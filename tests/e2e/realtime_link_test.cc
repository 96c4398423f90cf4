// Disciplined clocks end to end (issue 12, part 3; docs/time-model.md,
// "Disciplined clocks"). A trainer and an agent whose clocks read 3.2 s ahead
// and run 80 ppm fast sit behind an asymmetric TCP link (tools/linkemu
// TcpDelayProxy): 30 ms ± 1 ms client→server, 2 ms ± 1 ms back. The
// round-trip model cannot see that asymmetry: its mapped times are about
// (30 − 2)/2 = 14 ms late, inside its stated δ_min/2 of at least 15 ms
// (RFC 5905 §8). Both hosts' kernels are replaced by FakeDisciplines whose
// real time is this machine's CLOCK_REALTIME, so "synchronised" is true: the
// client and the server read the very same clock.
//
// Phases, each flushed before the next so that every message is mapped under
// the phase's settings:
//   A  both synchronised, 1 ms bounds: mapped through real time, with an
//      error far below the asymmetry and a bound below δ_min/2;
//   B  the client's kernel unsynchronised: it sends no reading; round trip;
//   C  the server's kernel unsynchronised: round trip, the client's reading
//      kept in the record;
//   D  both "synchronised" but the client's real time 60 ms off (beyond its
//      1 ms bound): the two routes disagree beyond both bounds; round trip.
// Steps are sent back to back (each starts where the last one ended) and
// must stay so across the changes of route (the ingest reactor's order
// guard). The truth is CLOCK_MONOTONIC at each event, turned into session
// time with the session's anchor (docs/architecture.md §4), as in
// clock_link_test. No timing is asserted.
#include <grpcpp/grpcpp.h>
#include <gtest/gtest.h>
#include <sqlite3.h>

#include <chrono>
#include <cstdint>
#include <cstdlib>
#include <iostream>
#include <map>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include "clients/common/stream_client.h"
#include "server/core/disciplined_clock.h"
#include "server/core/time.h"
#include "tests/e2e/simulated_client.h"
#include "tests/rpc/test_server.h"
#include "tools/linkemu/simulated_clock.h"
#include "tools/linkemu/tcp_delay_proxy.h"

namespace tickmark {
namespace {

namespace v1 = tickmark::v1;
using tickmark::testing::Anchor;
using tickmark::testing::ReadAnchor;
using tickmark::testing::SimulatedSource;
using std::chrono::milliseconds;
using std::chrono::seconds;
using SteadyClock = std::chrono::steady_clock;

constexpr Duration kForward = Duration::Millis(30);
constexpr Duration kBackward = Duration::Millis(2);
constexpr Duration kJitter = Duration::Millis(1);
constexpr Duration kBound = Duration::Millis(1);  // both kernels' maxerror
constexpr int kPerPhase = 8;
constexpr milliseconds kSpacing{100};





enum class Phase { kBothSynced, kClientUnsynced, kServerUnsynced, kClientOff };

const char* PhaseName(Phase p) {
  switch (p) {
    case Phase::kBothSynced:
      return "A both synchronised";
    case Phase::kClientUnsynced:
      return "B client unsynchronised";
    case Phase::kServerUnsynced:
      return "C server unsynchronised";
    case Phase::kClientOff:
      return "D client 60 ms off its bound";
  }
  return "?";
}

// One event as the client stamped it.
struct LinkStamp {
  Phase phase;
  int64_t source_ns;  // the simulated clock's reading
  int64_t mono_ns;    // CLOCK_MONOTONIC at that instant: the truth
};

TEST(RealtimeLinkTest, RealTimeBeatsTheAsymmetryBoundOnlyWhenBothSidesAreSynchronised) {
  FakeDiscipline server_kernel;  // this machine's CLOCK_REALTIME
  server_kernel.SetSynced(kBound);
  FakeDiscipline client_kernel;
  client_kernel.SetSynced(kBound);

  tickmark::testing::TempDir dir;
  rpc::LiveService::Options live = tickmark::testing::TestLiveOptions();
  live.discipline = &server_kernel;            // the test hook
  live.discipline_refresh = Duration::Zero();  // see each phase's state at once
  tickmark::testing::TestServer server(dir.path(), live);
  const auto [session, admin_token] = server.CreateSession("dock rover, disciplined clocks");
  const std::string trainer_token =
      server.IssueToken(session, v1::ROLE_TRAINER, "p07", admin_token);
  const std::string agent_token = server.IssueToken(session, v1::ROLE_AGENT, "rover", admin_token);
  ASSERT_FALSE(trainer_token.empty());
  ASSERT_FALSE(agent_token.empty());

  linkemu::ProxyConfig link;
  link.target = {"127.0.0.1", static_cast<uint16_t>(server.server().port())};
  link.profile = linkemu::LinkProfile{
      kForward,   kBackward, linkemu::Jitter::Uniform(kJitter), linkemu::Jitter::Uniform(kJitter),
      0.0,        0.0,
      /*seed=*/12};
  linkemu::TcpDelayProxy proxy(link);
  ASSERT_FALSE(proxy.Start()) << "proxy did not start";

  SystemMonotonic mono;
  const linkemu::SimulatedClock sim(&mono, Duration::Millis(3200), 80);
  const SimulatedSource client_clock(&sim);
  auto options = [&](const std::string& token, const std::string& id) {
    client::StreamOptions o;
    o.target = "127.0.0.1:" + std::to_string(proxy.port());
    o.token = token;
    o.client_id = id;
    o.source = {v1::SOURCE_KIND_SCRIPT, "behind a 30 ms / 2 ms link", "realtime_link_test"};
    o.credentials = grpc::InsecureChannelCredentials();
    o.clock = &client_clock;
    o.discipline = &client_kernel;
    return o;
  };
  client::TrainerClient trainer;
  ASSERT_TRUE(trainer.Connect(options(trainer_token, "dock-rover-keys-1")).ok());
  client::AgentClient agent;
  ASSERT_TRUE(agent.Connect(options(agent_token, "dock-rover-agent-1")).ok());

  std::vector<LinkStamp> feedback_sent;
  std::vector<LinkStamp> step_starts;  // step k runs from step_starts[k] to step_starts[k+1]
  uint64_t step_id = 0;
  for (const Phase phase :
       {Phase::kBothSynced, Phase::kClientUnsynced, Phase::kServerUnsynced, Phase::kClientOff}) {
    client_kernel.SetSynced(kBound);
    client_kernel.SetRealtimeOffset(Duration::Zero());
    server_kernel.SetSynced(kBound);
    if (phase == Phase::kClientUnsynced) client_kernel.SetUnsynced();
    if (phase == Phase::kServerUnsynced) server_kernel.SetUnsynced();
    if (phase == Phase::kClientOff) client_kernel.SetRealtimeOffset(-Duration::Millis(60));
    // Real time passes between events so that the round-trip model keeps
    // probing; nothing waits for a result by sleeping.
    const auto start = SteadyClock::now();
    for (int i = 0; i < kPerPhase; ++i) {
      std::this_thread::sleep_until(start + i * kSpacing);
      const int64_t m = mono.NowNanos();
      const int64_t c = sim.At(m).nanos();
      feedback_sent.push_back({phase, c, m});
      v1::FeedbackMessage f;
      f.set_value(i % 3 == 2 ? -1.0 : 1.0);
      f.set_event_source_ns(c);
      f.set_input("key:g");
      ASSERT_TRUE(trainer.Send(f).ok());
      step_starts.push_back({phase, c, m});
      if (step_starts.size() >= 2) {
        v1::StepMessage s;
        s.set_step_id(++step_id);
        s.set_start_agent_ns(step_starts[step_starts.size() - 2].source_ns);
        s.set_end_agent_ns(c);
        s.set_action(i % 2 ? "north" : "east");  // dock rover actions (docs/architecture.md §8)
        ASSERT_TRUE(agent.Send(s).ok());
      }
    }
    ASSERT_TRUE(trainer.Flush(SteadyClock::now() + seconds(20)).ok());
    ASSERT_TRUE(agent.Flush(SteadyClock::now() + seconds(20)).ok());
  }
  EXPECT_EQ(trainer.status().rejected, 0u);
  EXPECT_EQ(agent.status().rejected, 0u);
  EXPECT_TRUE(trainer.Close(SteadyClock::now() + seconds(10)).ok());
  EXPECT_TRUE(agent.Close(SteadyClock::now() + seconds(10)).ok());
  EXPECT_GE(proxy.counters().connections, 1u);  // really through the link (one shared channel)

  const std::optional<Anchor> anchor = ReadAnchor(server.server().ledger_path(), session);
  ASSERT_TRUE(anchor.has_value());
  auto truth = [&](int64_t mono_ns) {
    return anchor->utc_anchor_ns + (mono_ns - anchor->mono_anchor_ns);  // docs/architecture.md §4
  };
  // The asymmetry the round trip cannot see, at its smallest with jitter:
  // ((30 − 1) − (2 + 1)) / 2 = 13 ms (RFC 5905 §8: θ is off by half the
  // difference of the one-way delays).
  const int64_t kHiddenAsymmetry = ((kForward - kJitter) - (kBackward + kJitter)).nanos() / 2;

  // Feedback.
  const auto feedback = server.Records(session, admin_token, v1::RECORD_KIND_FEEDBACK);
  ASSERT_EQ(feedback.size(), feedback_sent.size());
  std::map<int64_t, const v1::Feedback*> by_source;
  for (const v1::Record& r : feedback) by_source[r.feedback().event_source_ns()] = &r.feedback();
  int64_t worst_realtime_error = 0;
  for (const LinkStamp& s : feedback_sent) {
    SCOPED_TRACE(::testing::Message() << PhaseName(s.phase) << ", source " << s.source_ns);
    ASSERT_TRUE(by_source.count(s.source_ns));
    const v1::Feedback& f = *by_source[s.source_ns];
    const int64_t error = f.event_session_ns() - truth(s.mono_ns);
    EXPECT_GT(f.round_trip_uncertainty_ns(), 0);
    switch (s.phase) {
      case Phase::kBothSynced:
        EXPECT_EQ(f.time_source(), v1::TIME_SOURCE_REALTIME);
        EXPECT_EQ(f.time_source_reason(), "realtime");
        // The kernel's bound plus half the client's read spread.
        EXPECT_GE(f.client_realtime_bound_ns(), kBound.nanos());
        EXPECT_LT(f.client_realtime_bound_ns(), (kBound * 2).nanos());
        EXPECT_EQ(f.server_realtime_bound_ns(), kBound.nanos());
        EXPECT_GT(f.event_realtime_ns(), 0);
        // Inside its own stated bound, and that bound beats the round trip's,
        // which is at least the hidden asymmetry (δ_min/2 ≥ it).
        EXPECT_LE(std::llabs(error), f.uncertainty_ns()) << "error " << error;
        EXPECT_LT(f.uncertainty_ns(), f.round_trip_uncertainty_ns());
        EXPECT_GE(f.round_trip_uncertainty_ns(), kHiddenAsymmetry);
        // The real error beats what the round trip can reach on this link.
        EXPECT_LT(std::llabs(error), kHiddenAsymmetry);
        worst_realtime_error = std::max<int64_t>(worst_realtime_error, std::llabs(error));
        break;
      case Phase::kClientUnsynced:
        EXPECT_EQ(f.time_source(), v1::TIME_SOURCE_ROUND_TRIP);
        EXPECT_EQ(f.time_source_reason(), "no_reading");  // an unsynchronised client sends none
        EXPECT_EQ(f.event_realtime_ns(), 0);
        EXPECT_EQ(f.uncertainty_ns(), f.round_trip_uncertainty_ns());
        break;
      case Phase::kServerUnsynced:
        EXPECT_EQ(f.time_source(), v1::TIME_SOURCE_ROUND_TRIP);
        EXPECT_EQ(f.time_source_reason(), "server_unsynced");
        EXPECT_GT(f.event_realtime_ns(), 0);  // kept for a later look
        EXPECT_EQ(f.server_realtime_bound_ns(), Duration::Seconds(16).nanos());
        EXPECT_EQ(f.uncertainty_ns(), f.round_trip_uncertainty_ns());
        break;
      case Phase::kClientOff:
        EXPECT_EQ(f.time_source(), v1::TIME_SOURCE_ROUND_TRIP);
        EXPECT_EQ(f.time_source_reason(), "disagrees");
        EXPECT_EQ(f.uncertainty_ns(), f.round_trip_uncertainty_ns());
        break;
    }
  }

  // Steps: back to back on the agent's clock, so back to back on session
  // time whichever route mapped them.
  const auto steps = server.Records(session, admin_token, v1::RECORD_KIND_STEP);
  ASSERT_EQ(steps.size(), step_starts.size() - 1);
  std::map<uint64_t, const v1::Step*> by_id;
  for (const v1::Record& r : steps) by_id[r.step().step_id()] = &r.step();
  int moved = 0;
  for (uint64_t id = 1; id <= steps.size(); ++id) {
    SCOPED_TRACE(::testing::Message() << "step " << id);
    ASSERT_TRUE(by_id.count(id));
    const v1::Step& st = *by_id[id];
    const LinkStamp& begin = step_starts[id - 1];
    const LinkStamp& end = step_starts[id];
    // A step's route is decided when it arrives, by the phase its end was
    // sent in (its reading is its start's, taken at sending).
    const bool realtime = end.phase == Phase::kBothSynced;
    EXPECT_EQ(st.time_source(), realtime ? v1::TIME_SOURCE_REALTIME : v1::TIME_SOURCE_ROUND_TRIP)
        << st.time_source_reason();
    EXPECT_LT(st.start_session_ns(), st.end_session_ns());
    if (id > 1) {
      EXPECT_EQ(st.start_session_ns(), by_id[id - 1]->end_session_ns());
    }
    if (st.time_source_reason().find("moved") != std::string::npos) {
      ++moved;
      EXPECT_GT(st.uncertainty_ns(), st.round_trip_uncertainty_ns());
    }
    if (realtime) {
      EXPECT_LE(std::llabs(st.start_session_ns() - truth(begin.mono_ns)), st.uncertainty_ns());
      EXPECT_LE(std::llabs(st.end_session_ns() - truth(end.mono_ns)), st.uncertainty_ns());
      EXPECT_LT(st.uncertainty_ns(), st.round_trip_uncertainty_ns());
    }
  }
  // The first round-trip step after the real-time ones starts where the last
  // of those ended, 13 ms or more from where the round trip put it.
  EXPECT_GE(moved, 1);

  std::cout << "worst |mapped - true| through real time "
            << static_cast<double>(worst_realtime_error) * 1e-3 << " us; hidden asymmetry at least "
            << static_cast<double>(kHiddenAsymmetry) * 1e-6 << " ms; steps moved " << moved << "\n";
  proxy.Stop();
  server.Shutdown();
}

}  // namespace
}  // namespace tickmark

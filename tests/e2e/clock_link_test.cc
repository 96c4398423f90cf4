// End to end through the link emulator (issue 3): a trainer source whose
// clock reads 3.2 s ahead and runs 80 ppm fast sits behind a TCP link of
// 20 ms ± 5 ms each way (tools/linkemu TcpDelayProxy) in front of an
// in-process tickmarkd. The client is the real reconnecting TrainerClient
// (clients/common) with a SimulatedClock as its clock, so the server's probes
// and the feedback event times both come from the simulated clock.
//
// The truth is known exactly: the test reads CLOCK_MONOTONIC (which is the
// server's session clock source, same process) at the instant the simulated
// clock is read, and the session's anchor from the ledger's `session` table
// turns that into the true session time of the event:
//   true session time = utc_anchor + (CLOCK_MONOTONIC − mono_anchor)
// (docs/architecture.md §4). Each stored feedback must lie within its own stated
// uncertainty of that truth. No timing is asserted; the sessions really
// last ~16 s and ~8 s because the server's clock is the real one.
//
// A second run (issue 12) has the clock 150 ppm fast, beyond the server's
// 100 ppm drift prior, and sends feedback from the moment it is connected,
// while the server probes fast (adaptive probing).
//
// After the first run, `tickmark export` (the CLI binary) must show the raw source time, the
// arrival time and the mapped session time of each feedback on one line.
#include <grpcpp/grpcpp.h>
#include <gtest/gtest.h>
#include <sqlite3.h>
#include <stdio.h>

#include <algorithm>
#include <chrono>
#include <cstdint>
#include <cstdlib>
#include <fstream>
#include <iostream>
#include <map>
#include <memory>
#include <optional>
#include <regex>
#include <sstream>
#include <string>
#include <thread>
#include <tuple>
#include <vector>

#include "clients/common/stream_client.h"
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

constexpr Duration kClientOffset = Duration::Millis(3200);
constexpr double kClientDriftPpm = 80;
// ~16 s of session: longer than the model's 10 s minimum drift span, so
// both the unfitted (±500 ppm) and the fitted mapping are exercised.
constexpr int kFeedbackCount = 40;
constexpr milliseconds kFeedbackSpacing{400};


std::string BinDir() {
  const char* bin = std::getenv("TICKMARK_BIN");
  return bin != nullptr ? bin : TICKMARK_BIN_DIR;
}




// The integer value of "field":N in one JSON line, if present.
std::optional<int64_t> JsonInt(const std::string& line, const std::string& field) {
  const std::regex re("\"" + field + "\":(-?[0-9]+)");
  std::smatch m;
  if (!std::regex_search(line, m, re)) return std::nullopt;
  return std::stoll(m[1].str());
}

// One feedback as the client stamped it.
struct Stamped {
  int64_t source_ns;  // the simulated clock's reading (event_source_ns)
  int64_t mono_ns;    // CLOCK_MONOTONIC at that same instant
};

// A trainer behind the emulated 20 ms ± 5 ms link whose clock reads 3.2 s
// ahead and runs `drift_ppm` fast sends `count` feedback `spacing` apart,
// starting as soon as it is connected. Each stored feedback must lie within
// its own stated uncertainty of the truth.
struct LinkRun {
  tickmark::testing::TempDir dir;
  std::unique_ptr<tickmark::testing::TestServer> server;
  std::string session, admin_token;
  std::vector<v1::Record> feedback;
  std::vector<v1::Record> models;  // the ClockModelUpdate records
  int64_t max_error = 0;
  int64_t min_uncertainty = INT64_MAX;
};

void RunBehindLink(double drift_ppm, int count, milliseconds spacing, LinkRun* run) {
  run->server = std::make_unique<tickmark::testing::TestServer>(run->dir.path());
  tickmark::testing::TestServer& server = *run->server;
  std::tie(run->session, run->admin_token) =
      server.CreateSession("dock rover, clock through a link");
  const std::string& session = run->session;
  const std::string& admin_token = run->admin_token;
  const std::string trainer_token =
      server.IssueToken(session, v1::ROLE_TRAINER, "p07", admin_token);
  ASSERT_FALSE(trainer_token.empty());

  linkemu::ProxyConfig link;
  link.target = {"127.0.0.1", static_cast<uint16_t>(server.server().port())};
  link.profile = linkemu::LinkProfile::Symmetric(
      Duration::Millis(20), linkemu::Jitter::Uniform(Duration::Millis(5)), 0.0, /*seed=*/3);
  linkemu::TcpDelayProxy proxy(link);
  ASSERT_FALSE(proxy.Start()) << "proxy did not start";

  SystemMonotonic mono;
  const linkemu::SimulatedClock sim(&mono, kClientOffset, drift_ppm);
  const SimulatedSource client_clock(&sim);

  client::TrainerClient trainer;
  client::StreamOptions opts;
  opts.target = "127.0.0.1:" + std::to_string(proxy.port());
  opts.token = trainer_token;
  opts.client_id = "dock-rover-keys-1";
  opts.source.kind = v1::SOURCE_KIND_TERMINAL;
  opts.source.description = "keys behind an emulated 20 ms ± 5 ms link";
  opts.source.software = "clock_link_test";
  opts.credentials = grpc::InsecureChannelCredentials();
  opts.clock = &client_clock;
  ASSERT_TRUE(trainer.Connect(opts).ok());

  // Real time must pass for the probes to span the drift fit, so events are
  // paced on the steady clock; nothing below waits for a result by sleeping.
  std::vector<Stamped> stamped;
  const auto start = SteadyClock::now();
  for (int i = 0; i < count; ++i) {
    std::this_thread::sleep_until(start + i * spacing);
    const int64_t m = mono.NowNanos();
    const int64_t c = sim.At(m).nanos();
    stamped.push_back({c, m});
    v1::FeedbackMessage f;
    f.set_value(i % 3 == 2 ? -1.0 : 1.0);
    f.set_event_source_ns(c);
    f.set_input(i % 3 == 2 ? "disapprove" : "approve");
    ASSERT_TRUE(trainer.Send(f).ok());
  }
  ASSERT_TRUE(trainer.Flush(SteadyClock::now() + seconds(20)).ok());
  EXPECT_EQ(trainer.status().rejected, 0u);
  EXPECT_TRUE(trainer.Close(SteadyClock::now() + seconds(10)).ok());

  const std::optional<Anchor> anchor = ReadAnchor(server.server().ledger_path(), session);
  ASSERT_TRUE(anchor.has_value());
  auto true_session_ns = [&](int64_t mono_ns) {
    return anchor->utc_anchor_ns + (mono_ns - anchor->mono_anchor_ns);  // docs/architecture.md §4
  };

  run->feedback = server.Records(session, admin_token, v1::RECORD_KIND_FEEDBACK);
  run->models = server.Records(session, admin_token, v1::RECORD_KIND_CLOCK_MODEL);
  ASSERT_EQ(run->feedback.size(), stamped.size());
  // The client really went through the emulated link.
  EXPECT_GE(proxy.counters().connections, 1u);
  std::map<int64_t, const v1::Feedback*> by_source;
  for (const v1::Record& r : run->feedback)
    by_source[r.feedback().event_source_ns()] = &r.feedback();
  for (const Stamped& s : stamped) {
    SCOPED_TRACE(::testing::Message() << "event_source_ns " << s.source_ns);
    auto it = by_source.find(s.source_ns);
    ASSERT_NE(it, by_source.end());
    const v1::Feedback& f = *it->second;
    const int64_t truth = true_session_ns(s.mono_ns);
    const int64_t error = f.event_session_ns() - truth;
    EXPECT_GT(f.uncertainty_ns(), 0);
    // The model's stated bound: δ/2 (RFC 5905 §8 asymmetry bound), the
    // offset scatter, and growth at PHI (RFC 5905 §9.2) + the drift's error
    // bound or prior; the truth must lie inside.
    EXPECT_LE(std::llabs(error), f.uncertainty_ns())
        << "mapped " << f.event_session_ns() << " true " << truth;
    // Causality, a fact of the trade: a message arrives after its event.
    EXPECT_GT(f.arrival_session_ns(), truth);
    run->max_error = std::max<int64_t>(run->max_error, std::llabs(error));
    run->min_uncertainty = std::min<int64_t>(run->min_uncertainty, f.uncertainty_ns());
  }
  // For the reader of the log, not asserted.
  std::cout << "max |mapped - true| " << static_cast<double>(run->max_error) * 1e-6
            << " ms; smallest stated uncertainty "
            << static_cast<double>(run->min_uncertainty) * 1e-6 << " ms; " << run->models.size()
            << " clock model updates\n";
  proxy.Stop();
}

TEST(ClockLinkTest, FeedbackLandsWithinItsUncertaintyBehindAJitteryLinkWithAnOffDriftingClock) {
  LinkRun run;
  RunBehindLink(kClientDriftPpm, kFeedbackCount, kFeedbackSpacing, &run);
  if (::testing::Test::HasFatalFailure()) return;
  tickmark::testing::TestServer& server = *run.server;
  const std::string& session = run.session;
  const std::string& admin_token = run.admin_token;
  const std::vector<v1::Record>& feedback = run.feedback;
  tickmark::testing::TempDir& dir = run.dir;

  // `tickmark export`: raw, arrival and session time side by side, one line
  // per feedback, equal to what the ledger holds.
  const std::string token_file = dir.path() + "/admin.token";
  {
    std::ofstream t(token_file);
    t << admin_token << "\n";
  }
  const std::string cmd = BinDir() + "/tickmark export --server 127.0.0.1:" +
                          std::to_string(server.server().port()) + " --token-file " + token_file +
                          " --session " + session + " --kinds feedback 2>/dev/null";
  FILE* p = popen(cmd.c_str(), "r");
  ASSERT_NE(p, nullptr);
  std::string out;
  char buf[4096];
  for (size_t n; (n = fread(buf, 1, sizeof buf, p)) > 0;) out.append(buf, n);
  ASSERT_EQ(pclose(p), 0) << cmd;
  std::map<int64_t, const v1::Feedback*> by_seq;
  for (const v1::Record& r : feedback) by_seq[r.sequence()] = &r.feedback();
  size_t lines = 0;
  std::stringstream in(out);
  for (std::string line; std::getline(in, line);) {
    if (line.empty()) continue;
    ++lines;
    SCOPED_TRACE(line);
    const auto seq = JsonInt(line, "seq");
    ASSERT_TRUE(seq.has_value());
    ASSERT_TRUE(by_seq.count(*seq));
    const v1::Feedback& f = *by_seq[*seq];
    EXPECT_EQ(JsonInt(line, "event_source_ns"), f.event_source_ns());
    EXPECT_EQ(JsonInt(line, "arrival_session_ns"), f.arrival_session_ns());
    EXPECT_EQ(JsonInt(line, "event_session_ns"), f.event_session_ns());
    EXPECT_EQ(JsonInt(line, "uncertainty_ns"), f.uncertainty_ns());
  }
  EXPECT_EQ(lines, feedback.size());
  server.Shutdown();
}

// Issue 12: a clock 150 ppm fast, beyond the 100 ppm drift prior, with
// feedback from the moment the stream is up (every 50 ms for 8 s): each one
// inside its stated uncertainty, from the first second on. While no fitted
// drift is trusted, the model says so and states the prior as the drift's
// error bound.
TEST(ClockLinkTest, AClockBeyondThePriorIsCoveredFromTheFirstSecond) {
  LinkRun run;
  RunBehindLink(150, 160, milliseconds{50}, &run);
  if (::testing::Test::HasFatalFailure()) return;
  ASSERT_FALSE(run.models.empty());
  for (const v1::Record& r : run.models) {
    const v1::ClockModelUpdate& u = r.clock_model();
    // The stated terms add up (docs/time-model.md, "Uncertainty").
    EXPECT_EQ(u.uncertainty_ns(), u.asymmetry_ns() + u.offset_scatter_ns());
    if (!u.drift_fitted()) {
      EXPECT_EQ(u.drift_ppm(), 0.0);
      EXPECT_EQ(u.drift_error_ppm(), 100.0);  // the default prior, common practice, no source
    } else {
      EXPECT_LT(u.drift_error_ppm(), 100.0);
    }
  }
  run.server->Shutdown();
}

}  // namespace
}  // namespace tickmark

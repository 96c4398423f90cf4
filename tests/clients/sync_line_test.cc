// The sync line's schedule and timing (clients/serial/sync_line.h), driven
// through a fake ModemLines and a FakeMonotonic: pseudo-terminals have no
// modem control lines, so no test here moves a real line (docs/sync.md,
// "What is tested"). The fake advances the clock inside each ioctl so the
// bracket around it is known exactly.
#include "clients/serial/sync_line.h"

#include <sys/ioctl.h>

#include <deque>
#include <vector>

#include "gtest/gtest.h"

namespace tickmark::serial {
namespace {

// Records every Set with the clock readings around it; each ioctl "takes"
// ioctl_ns on the fake clock.
class FakeLines final : public ModemLines {
 public:
  struct Call {
    ModemLine line;
    bool level;
    int64_t start_ns;
    int64_t end_ns;
  };
  FakeLines(FakeMonotonic* clock, int64_t ioctl_ns) : clock_(clock), ioctl_ns_(ioctl_ns) {}
  absl::Status Set(ModemLine line, bool level) override {
    const int64_t start = clock_->NowNanos();
    clock_->Advance(Duration::Nanos(ioctl_ns_));
    calls.push_back({line, level, start, clock_->NowNanos()});
    bits_ = level ? (bits_ | ModemLineBit(line)) : (bits_ & ~ModemLineBit(line));
    return absl::OkStatus();
  }
  absl::StatusOr<int> Get() override {
    clock_->Advance(Duration::Nanos(ioctl_ns_));
    return bits_;
  }
  absl::Status WaitChange(int) override {
    if (changes_.empty()) return absl::CancelledError("no more changes");
    const auto [at_ns, bits] = changes_.front();
    changes_.pop_front();
    clock_->Set(at_ns);
    bits_ = bits;
    return absl::OkStatus();
  }
  void Interrupt() override {}
  std::string device() const override { return "fake"; }

  // An outside system drives the input lines to `bits` at at_ns.
  void Push(int64_t at_ns, int bits) { changes_.emplace_back(at_ns, bits); }

  std::vector<Call> calls;

 private:
  FakeMonotonic* clock_;
  int64_t ioctl_ns_;
  int bits_ = 0;
  std::deque<std::pair<int64_t, int>> changes_;
};

// Runs the engine for `seconds` of fake time, advancing to each Due().
std::vector<SyncEdge> RunFor(SyncOutEngine& e, FakeMonotonic& clock, double seconds,
                             const std::function<void(int64_t)>& at_step = nullptr) {
  std::vector<SyncEdge> edges;
  const int64_t end = clock.NowNanos() + static_cast<int64_t>(seconds * 1e9);
  while (e.Due() < end) {
    if (e.Due() > clock.NowNanos()) clock.Set(e.Due());
    if (at_step) at_step(clock.NowNanos());
    auto edge = e.Fire();
    EXPECT_TRUE(edge.ok());
    if (edge.ok() && edge->has_value()) edges.push_back(**edge);
  }
  return edges;
}

TEST(SyncLineTest, ParsesLineNames) {
  EXPECT_EQ(ParseModemLine("dtr"), ModemLine::kDtr);
  EXPECT_EQ(ParseModemLine("RTS"), ModemLine::kRts);
  EXPECT_EQ(ParseModemLine("cd"), ModemLine::kDcd);
  EXPECT_FALSE(ParseModemLine("RI").has_value());
  EXPECT_TRUE(IsOutputLine(ModemLine::kRts));
  EXPECT_FALSE(IsOutputLine(ModemLine::kCts));
  // The TIOCM_* bits of <sys/ioctl.h> (Linux tty_ioctl(4)).
  EXPECT_EQ(ModemLineBit(ModemLine::kDtr), TIOCM_DTR);
  EXPECT_EQ(ModemLineBit(ModemLine::kDcd), TIOCM_CAR);
}

TEST(SyncLineTest, PulsesAtJitteredIntervalsWithTheirWidth) {
  FakeMonotonic clock(5'000'000'000);
  FakeLines lines(&clock, 3'000);  // every ioctl takes 3 µs
  SyncOutOptions o;
  o.line = ModemLine::kRts;
  o.interval = Duration::Seconds(1);
  o.jitter = 0.25;
  o.width = Duration::Millis(10);
  o.seed = 7;
  SyncOutEngine e(o, &lines, &clock);
  ASSERT_TRUE(e.Start().ok());
  ASSERT_EQ(lines.calls.size(), 1u);  // the line released at the start
  EXPECT_FALSE(lines.calls[0].level);
  const std::vector<SyncEdge> edges = RunFor(e, clock, 120);
  ASSERT_GE(edges.size(), 190u);
  ASSERT_EQ(edges.size() % 2, 0u);
  std::vector<double> gaps;
  for (size_t i = 0; i < edges.size(); ++i) {
    const SyncEdge& x = edges[i];
    const FakeLines::Call& c = lines.calls[i + 1];
    EXPECT_EQ(x.line, ModemLine::kRts);
    EXPECT_EQ(c.line, ModemLine::kRts);
    EXPECT_EQ(x.level, i % 2 == 0);  // rise, fall, rise, ...
    EXPECT_EQ(c.level, x.level);
    // The edge is the middle of the readings around the ioctl, ± half.
    EXPECT_EQ(x.event_ns, c.start_ns + 1'500);
    EXPECT_EQ(x.half_bracket_ns, 1'500);
    EXPECT_EQ(x.pulse_index, i / 2 + 1);
    EXPECT_EQ(x.reason, SyncEdge::Reason::kInterval);
    if (i % 2 == 1) {
      // The width: the fall is due 10 ms after the rise's time.
      EXPECT_NEAR(static_cast<double>(x.event_ns - edges[i - 1].event_ns), 10e6, 4e3);
    } else if (i >= 2) {
      gaps.push_back(static_cast<double>(x.event_ns - edges[i - 2].event_ns) / 1e9);
    }
  }
  // Every gap within interval × [0.75, 1.25] (plus the ioctl times), and the
  // train is not periodic: the gaps spread over most of that range.
  double lo = 10, hi = 0, sum = 0;
  for (double g : gaps) {
    lo = std::min(lo, g);
    hi = std::max(hi, g);
    sum += g;
  }
  EXPECT_GE(lo, 0.75);
  EXPECT_LE(hi, 1.25 + 1e-4);
  EXPECT_GT(hi - lo, 0.3);
  EXPECT_NEAR(sum / static_cast<double>(gaps.size()), 1.0, 0.06);
}

TEST(SyncLineTest, MarkerPulsesGoOutWhenTheLineIsFree) {
  FakeMonotonic clock(5'000'000'000);
  FakeLines lines(&clock, 1'000);
  SyncOutOptions o;
  o.width = Duration::Millis(20);
  o.seed = 3;
  SyncOutEngine e(o, &lines, &clock);
  ASSERT_TRUE(e.Start().ok());
  bool queued = false;
  int64_t queued_at = 0;
  const std::vector<SyncEdge> edges = RunFor(e, clock, 10, [&](int64_t now) {
    // Queue a marker while the third interval pulse is still high.
    if (!queued && e.Due() == now && lines.calls.size() == 6) {
      e.QueueMarker(42);
      queued = true;
      queued_at = now;
    }
  });
  ASSERT_TRUE(queued);
  size_t marker_rises = 0;
  for (size_t i = 0; i < edges.size(); ++i) {
    if (edges[i].reason != SyncEdge::Reason::kMarker) continue;
    EXPECT_EQ(edges[i].marker_sequence, 42u);
    if (!edges[i].level) continue;
    ++marker_rises;
    // After the interval pulse ended and one width of low line.
    ASSERT_GE(i, 1u);
    EXPECT_FALSE(edges[i - 1].level);
    EXPECT_GE(edges[i].event_ns - edges[i - 1].event_ns, 20'000'000);
    EXPECT_LT(edges[i].event_ns - queued_at, 60'000'000);
  }
  EXPECT_EQ(marker_rises, 1u);
}

TEST(SyncLineTest, ToggleModeMakesOneEdgePerPulseAndStopReleases) {
  FakeMonotonic clock;
  FakeLines lines(&clock, 2'000);
  SyncOutOptions o;
  o.width = Duration::Zero();
  o.jitter = 0;
  o.interval = Duration::Millis(500);
  SyncOutEngine e(o, &lines, &clock);
  ASSERT_TRUE(e.Start().ok());
  const std::vector<SyncEdge> edges = RunFor(e, clock, 2.6);
  ASSERT_EQ(edges.size(), 5u);
  for (size_t i = 0; i < edges.size(); ++i) {
    EXPECT_EQ(edges[i].level, i % 2 == 0);
    EXPECT_EQ(edges[i].pulse_index, i + 1);
  }
  auto last = e.Stop();  // the line was left high by the fifth toggle
  ASSERT_TRUE(last.ok());
  ASSERT_TRUE(last->has_value());
  EXPECT_FALSE((*last)->level);
  EXPECT_FALSE(lines.calls.back().level);
}

TEST(SyncLineTest, InputEdgesAreTimedAtTheWakeUpAndCountRises) {
  FakeMonotonic clock;
  FakeLines lines(&clock, 4'000);  // the TIOCMGET takes 4 µs
  std::vector<SyncEdge> seen;
  SyncInWatcher w(
      &lines, {ModemLine::kCts, ModemLine::kDcd}, &clock,
      [&](const SyncEdge& e) { seen.push_back(e); }, [](const absl::Status&) {});
  lines.Push(2'000'000'000, TIOCM_CTS);
  lines.Push(2'010'000'000, 0);
  lines.Push(3'000'000'000, TIOCM_CTS | TIOCM_RI);  // CTS rises again; RI is not watched
  lines.Push(3'500'000'000, TIOCM_CTS | TIOCM_RI | TIOCM_CAR);
  for (int i = 0; i < 4; ++i) ASSERT_TRUE(w.Step().ok());
  ASSERT_EQ(seen.size(), 4u);
  EXPECT_EQ(seen[0].line, ModemLine::kCts);
  EXPECT_TRUE(seen[0].level);
  EXPECT_FALSE(seen[0].out);
  EXPECT_EQ(seen[0].reason, SyncEdge::Reason::kExternal);
  EXPECT_EQ(seen[0].event_ns, 2'000'002'000);
  EXPECT_EQ(seen[0].half_bracket_ns, 2'000);
  EXPECT_EQ(seen[0].pulse_index, 1u);
  EXPECT_FALSE(seen[1].level);
  EXPECT_EQ(seen[1].pulse_index, 1u);  // the fall shares its pulse's index
  EXPECT_EQ(seen[2].pulse_index, 2u);
  EXPECT_EQ(seen[3].line, ModemLine::kDcd);
  EXPECT_EQ(seen[3].pulse_index, 1u);
  EXPECT_TRUE(absl::IsCancelled(w.Step()));
}

TEST(SyncLineTest, SimulatedLinesMoveNothingButReportTheirLevels) {
  auto sim = SimulatedModemLines("/dev/ttyUSB9");
  EXPECT_TRUE(sim->simulated());
  ASSERT_TRUE(sim->Set(ModemLine::kDtr, true).ok());
  EXPECT_EQ(*sim->Get(), TIOCM_DTR);
  sim->Interrupt();
  EXPECT_TRUE(absl::IsCancelled(sim->WaitChange(TIOCM_CTS)));
}

TEST(SyncLineTest, APseudoTerminalHasNoModemLines) {
  // Linux ptys implement no TIOCMGET (tty_ioctl(4): ENOTTY), which is why
  // the tests above use a fake; the message must say so and what to do.
  auto lines = OpenTtyModemLines("/dev/ptmx");
  ASSERT_FALSE(lines.ok());
  EXPECT_NE(lines.status().message().find("no modem control lines"), std::string::npos)
      << lines.status();
}

}  // namespace
}  // namespace tickmark::serial

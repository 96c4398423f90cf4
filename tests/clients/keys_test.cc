// tickmark-keys parsing: key decoding, profiles, feedback lines, flags and
// the status line. All fed bytes and strings; no terminal, no network.
#include <cstdlib>
#include <string>
#include <vector>

#include "clients/keys/calibration_screen.h"
#include "clients/keys/key_map.h"
#include "clients/keys/keys_flags.h"
#include "clients/keys/line_input.h"
#include "clients/keys/status_line.h"
#include "gtest/gtest.h"

namespace tickmark::keys {
namespace {

std::vector<std::string> Keys(const std::vector<KeyEvent>& events) {
  std::vector<std::string> out;
  for (const KeyEvent& e : events) out.push_back(e.key);
  return out;
}

TEST(KeyMapTest, DefaultBindings) {
  KeyMap m = KeyMap::Defaults();
  const auto events = m.Feed("f+j-qx");
  ASSERT_EQ(events.size(), 6u);
  EXPECT_EQ(events[0].kind, KeyEvent::Kind::kFeedback);
  EXPECT_EQ(events[0].value, 1.0);
  EXPECT_EQ(events[0].input(), "key:f");
  EXPECT_EQ(events[1].value, 1.0);
  EXPECT_EQ(events[2].value, -1.0);
  EXPECT_EQ(events[3].value, -1.0);
  EXPECT_EQ(events[4].kind, KeyEvent::Kind::kQuit);
  EXPECT_EQ(events[5].kind, KeyEvent::Kind::kUnbound);
  EXPECT_EQ(m.Legend(), "+,f approve  -,j disapprove  q quit");
}

TEST(KeyMapTest, DecodesNamedKeysAndArrowSequences) {
  KeyMap m = KeyMap::Defaults();
  // ECMA-48 CSI "ESC [ A".."ESC [ D" and SS3 "ESC O A" are the cursor keys
  // (xterm ctlseqs: normal and application cursor mode).
  EXPECT_EQ(Keys(m.Feed(" \r\n\t\x7f\x1b[A\x1bOB\x1b[C\x1b[D")),
            (std::vector<std::string>{"space", "enter", "enter", "tab",
                                      "backspace", "up", "down", "right", "left"}));
  // A sequence split across reads completes on the next read.
  EXPECT_TRUE(m.Feed("\x1b").empty());
  EXPECT_TRUE(m.Feed("[").empty());
  EXPECT_EQ(Keys(m.Feed("Af")), (std::vector<std::string>{"up", "f"}));
  // Sequences with parameters (e.g. F5 = ESC [ 1 5 ~) are not arrows.
  EXPECT_EQ(Keys(m.Feed("\x1b[15~j")), (std::vector<std::string>{"escape-sequence", "j"}));
  // A lone ESC followed by a key, or flushed after silence.
  EXPECT_EQ(Keys(m.Feed("\x1bj")), (std::vector<std::string>{"escape", "j"}));
  EXPECT_TRUE(m.Feed("\x1b").empty());
  EXPECT_EQ(Keys(m.FlushPending()), (std::vector<std::string>{"escape"}));
  EXPECT_TRUE(m.FlushPending().empty());
}

TEST(KeyMapTest, NonAsciiCharactersAreOneUnboundPress) {
  KeyMap m = KeyMap::Defaults();
  // "é" is C3 A9 and "€" E2 82 AC in UTF-8 (RFC 3629 §3).
  EXPECT_EQ(Keys(m.Feed("\xc3\xa9" "f\xe2\x82\xac" "j")),
            (std::vector<std::string>{"non-ascii", "f", "non-ascii", "j"}));
}

TEST(KeyMapTest, ShippedProfileEqualsDefaults) {
  const char* src = std::getenv("TICKMARK_SOURCE");
  const std::string root = src != nullptr ? src : TICKMARK_SOURCE_DIR;
  auto m = KeyMap::FromTomlFile(root + "/clients/keys/profiles/terminal.toml");
  ASSERT_TRUE(m.ok()) << m.status();
  EXPECT_EQ(m->name(), "terminal");
  const KeyMap d = KeyMap::Defaults();
  ASSERT_EQ(m->bindings().size(), d.bindings().size());
  for (const auto& [key, b] : d.bindings()) {
    ASSERT_EQ(m->bindings().count(key), 1u) << key;
    const Binding& got = m->bindings().at(key);
    EXPECT_EQ(got.action, b.action) << key;
    EXPECT_EQ(got.value, b.value) << key;
    EXPECT_EQ(got.label, b.label) << key;
  }
}

TEST(KeyMapTest, GradedProfile) {
  auto m = KeyMap::FromToml(R"(
name = "graded"
[[binding]]
keys = ["1", "left"]
value = -1
[[binding]]
keys = ["3"]
value = 0.5
label = "fine"
[[binding]]
keys = ["space"]
action = "quit"
)", "graded.toml");
  ASSERT_TRUE(m.ok()) << m.status();
  EXPECT_EQ(m->name(), "graded");
  const auto events = m->Feed("13\x1b[D f");
  ASSERT_EQ(events.size(), 5u);
  EXPECT_EQ(events[0].value, -1.0);  // integer accepted as a number
  EXPECT_EQ(events[0].label, "-1");
  EXPECT_EQ(events[1].value, 0.5);
  EXPECT_EQ(events[1].label, "fine");
  EXPECT_EQ(events[2].value, -1.0);
  EXPECT_EQ(events[2].key, "left");
  EXPECT_EQ(events[3].kind, KeyEvent::Kind::kQuit);
  EXPECT_EQ(events[4].kind, KeyEvent::Kind::kUnbound);  // defaults replaced
}

struct BadProfile {
  const char* name;
  const char* toml;
  const char* expected;  // substring of the error, with file:line:col
};

class BadProfileTest : public ::testing::TestWithParam<BadProfile> {};

TEST_P(BadProfileTest, ClearError) {
  auto m = KeyMap::FromToml(GetParam().toml, "p.toml");
  ASSERT_FALSE(m.ok());
  EXPECT_EQ(m.status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(m.status().message().find(GetParam().expected), std::string::npos)
      << m.status().message();
}

INSTANTIATE_TEST_SUITE_P(
    Profiles, BadProfileTest,
    ::testing::Values(
        BadProfile{"Syntax", "[[binding]\nkeys = [\"f\"]\n", "p.toml:1:"},
        BadProfile{"NoBindings", "name = \"x\"\n", "no [[binding]]"},
        BadProfile{"UnknownTopField", "nmae = \"x\"\n[[binding]]\nkeys=[\"f\"]\nvalue=1\n",
                   "p.toml:1:1: unknown field \"nmae\""},
        BadProfile{"UnknownBindingField", "[[binding]]\nkeys=[\"f\"]\nvalu=1\n",
                   "p.toml:3:1: binding 1: unknown field \"valu\""},
        BadProfile{"UnknownKey", "[[binding]]\nkeys=[\"ctrl-x\"]\nvalue=1\n",
                   "p.toml:2:7: binding 1: unknown key \"ctrl-x\""},
        BadProfile{"DuplicateKey",
                   "[[binding]]\nkeys=[\"f\"]\nvalue=1\n[[binding]]\nkeys=[\"f\"]\nvalue=-1\n",
                   "p.toml:5:7: binding 2: key \"f\" is already bound at line 2"},
        BadProfile{"ValueOutOfRange", "[[binding]]\nkeys=[\"f\"]\nvalue=1000.5\n",
                   "within [-1000, 1000]"},
        BadProfile{"ValueNotFinite", "[[binding]]\nkeys=[\"f\"]\nvalue=inf\n",
                   "within [-1000, 1000]"},
        BadProfile{"ValueNotNumber", "[[binding]]\nkeys=[\"f\"]\nvalue=\"1\"\n",
                   "value must be a number"},
        BadProfile{"NoValue", "[[binding]]\nkeys=[\"f\"]\n", "needs a value"},
        BadProfile{"EmptyKeys", "[[binding]]\nkeys=[]\nvalue=1\n", "non-empty array"},
        BadProfile{"BadAction", "[[binding]]\nkeys=[\"q\"]\naction=\"exit\"\n",
                   "action must be \"quit\""},
        BadProfile{"OnlyQuit", "[[binding]]\nkeys=[\"q\"]\naction=\"quit\"\n",
                   "no binding sends feedback"}),
    [](const ::testing::TestParamInfo<BadProfile>& p) { return std::string(p.param.name); });

TEST(KeyMapTest, MissingProfileFile) {
  EXPECT_EQ(KeyMap::FromTomlFile("/nonexistent/p.toml").status().code(),
            absl::StatusCode::kNotFound);
}

TEST(LineInputTest, SplitsAcrossReads) {
  LineSplitter s;
  EXPECT_TRUE(s.Feed("+1").empty());
  EXPECT_EQ(s.Feed("\n-1\r\n0.5"), (std::vector<std::string>{"+1", "-1"}));
  EXPECT_EQ(s.Finish(), "0.5");
  EXPECT_FALSE(s.Finish().has_value());
}

TEST(LineInputTest, ParsesValuesAndInputs) {
  auto plus = ParseFeedbackLine("+1");
  ASSERT_TRUE(plus.ok() && plus->has_value());
  EXPECT_EQ((*plus)->value, 1.0);
  EXPECT_EQ((*plus)->input, "line");
  auto minus = ParseFeedbackLine("  -1 key:j ");
  ASSERT_TRUE(minus.ok() && minus->has_value());
  EXPECT_EQ((*minus)->value, -1.0);
  EXPECT_EQ((*minus)->input, "key:j");
  auto graded = ParseFeedbackLine("0.5");
  ASSERT_TRUE(graded.ok() && graded->has_value());
  EXPECT_EQ((*graded)->value, 0.5);
  EXPECT_FALSE(ParseFeedbackLine("").value().has_value());
  EXPECT_FALSE(ParseFeedbackLine("# block 2").value().has_value());
  for (const char* bad : {"yes", "+", "+-1", "1x", "nan", "inf", "1001", "1 a b"}) {
    EXPECT_EQ(ParseFeedbackLine(bad).status().code(), absl::StatusCode::kInvalidArgument) << bad;
  }
}

TEST(KeysFlagsTest, DefaultsAndForms) {
  auto d = ParseKeysFlags({});
  ASSERT_TRUE(d.ok());
  EXPECT_EQ(d->connection.channel.target, "127.0.0.1:7461");
  EXPECT_FALSE(d->stdin_lines);
  auto f = ParseKeysFlags({"--server=dock.example.org:443", "--token-file", "/t",
                           "--stdin-lines", "--flush-timeout", "2.5", "--client-id",
                           "bench:1"});
  ASSERT_TRUE(f.ok()) << f.status();
  EXPECT_EQ(f->connection.channel.target, "dock.example.org:443");
  EXPECT_EQ(f->connection.token.token_file, "/t");
  EXPECT_TRUE(f->stdin_lines);
  EXPECT_EQ(f->flush_timeout_s, 2.5);
  EXPECT_EQ(f->connection.client_id, "bench:1");
  EXPECT_FALSE(ParseKeysFlags({"--server"}).ok());
  EXPECT_FALSE(ParseKeysFlags({"--frobnicate"}).ok());
  EXPECT_FALSE(ParseKeysFlags({"--flush-timeout", "-1"}).ok());
  EXPECT_FALSE(ParseKeysFlags({"--insecure=maybe"}).ok());
  EXPECT_NE(KeysUsage("f approve").find("f approve"), std::string::npos);
}

TEST(StatusLineTest, FormatsAndFitsWidth) {
  // 1700000000 s after the epoch is 2023-11-14 22:13:20 UTC (`date -u -d @1700000000`).
  EXPECT_EQ(FormatSessionClock(1'700'000'000'123'456'789), "22:13:20.123");
  client::StreamStatus st;
  st.state = client::StreamState::kConnected;
  st.subject = "trainer-7";
  st.sent = 3;
  st.acked = 2;
  st.pending = 1;
  const std::string line = FormatStatusLine(
      st, LastFeedback{1.0, 1'700'000'000'123'456'789, 1'200'000}, "f approve", 0);
  EXPECT_EQ(line,
            "connected as trainer-7  sent 3  acked 2  pending 1  last +1 @ "
            "22:13:20.123 ±1.2 ms | f approve");
  EXPECT_EQ(FormatStatusLine(st, std::nullopt, "", 9), "connected");
  st.state = client::StreamState::kWaiting;
  st.reconnects = 4;
  EXPECT_EQ(FormatStatusLine(st, std::nullopt, "", 0).rfind("reconnecting (4)", 0), 0u);
}

// --calibrate's screen (calibration_screen.h): the track fits 80 columns,
// the status line is cut, the result names every fit, the id and the plot.
TEST(CalibrationScreenTest, TrackFitsEightyColumnsWithMarkerOnItsCell) {
  const std::string t = FormatTrack(21, 20, "practice 5/5");
  EXPECT_LE(t.size(), 79u);
  EXPECT_EQ(t.find("[O]"), 1u + 20u * 3u);
  EXPECT_EQ(FormatTrack(21, 0, "move 7").rfind("|[O] - ", 0), 0u);
  client::CalibrationMoveView m;
  m.practice = false;
  m.index = 12;
  EXPECT_EQ(MoveLabel(m, 5), "move 12");
  m.practice = true;
  m.index = 2;
  EXPECT_EQ(MoveLabel(m, 5), "practice 2/5");
}

TEST(CalibrationScreenTest, StatusLine) {
  client::CalibrationProgress p;
  p.in_practice = true;
  p.practice_shown = 2;
  p.practice_total = 5;
  EXPECT_EQ(FormatCalibrationStatus(p, 0), "PRACTICE 2/5 (not measured)");
  p.in_practice = false;
  p.wanted = 40;
  p.valid = 5;
  p.wrong_sign = 1;
  p.missed = 2;
  p.moves = 9;
  p.max_moves = 120;
  p.last = "valid 0.52 s";
  EXPECT_EQ(FormatCalibrationStatus(p, 0),
            "valid 5/40 | wrong 1 missed 2 double 0 late 0 | move 9/120 | last: valid 0.52 s");
  EXPECT_EQ(FormatCalibrationStatus(p, 10).size(), 10u);
}

TEST(CalibrationScreenTest, ResultListsFitsChosenIntervalsWarningsAndPlot) {
  tickmark::v1::Calibration c;
  c.set_id("c-7f3a2c91");
  c.set_trainer("dock-trainer-1");
  c.set_run("cal-1");
  c.set_moves(44);
  c.set_valid(40);
  c.set_min_answers(40);
  auto* g = c.add_fits();
  g->set_family("gamma");
  g->set_parameters(2);
  g->set_aic(12.5);
  g->set_ks_distance(0.081);
  g->set_kernel_description("gamma(shape=4,scale=0.15s)");
  auto* l = c.add_fits();
  l->set_family("lognormal-mixture");
  l->set_error("did not converge");
  c.set_chosen(0);
  c.set_kernel_description("gamma(shape=4,scale=0.15s)");
  c.mutable_mean_interval()->set_low_s(0.55);
  c.mutable_mean_interval()->set_high_s(0.66);
  c.add_warnings("poor fit");
  const std::string r = FormatCalibrationResult(c);
  EXPECT_NE(r.find("c-7f3a2c91"), std::string::npos);
  EXPECT_NE(r.find("* gamma (k=2): AIC 12.50  KS 0.081"), std::string::npos) << r;
  EXPECT_NE(r.find("lognormal-mixture (k=0): no fit: did not converge"), std::string::npos) << r;
  EXPECT_NE(r.find("chosen kernel: gamma(shape=4,scale=0.15s)"), std::string::npos);
  EXPECT_NE(r.find("0.550 .. 0.660 s"), std::string::npos);
  EXPECT_NE(r.find("warning: poor fit"), std::string::npos);
  EXPECT_NE(r.find("tickmark calibrate show c-7f3a2c91 --plot fit.png"), std::string::npos);
}

TEST(CalibrationFlagsTest, CalibrationFlagsNeedCalibrate) {
  auto f = ParseKeysFlags({"--calibrate", "--answers", "12", "--practice", "2", "--min-interval",
                           "0.5", "--max-interval", "0.9", "--rule", "left"});
  ASSERT_TRUE(f.ok()) << f.status();
  EXPECT_TRUE(f->calibration.calibrate);
  EXPECT_EQ(f->calibration.answers, 12u);
  EXPECT_EQ(f->calibration.practice, 2u);
  EXPECT_DOUBLE_EQ(f->calibration.min_interval_s, 0.5);
  EXPECT_EQ(f->calibration.rule, "left");
  EXPECT_FALSE(ParseKeysFlags({"--answers", "12"}).ok());
  EXPECT_FALSE(ParseKeysFlags({"--calibrate", "--rule", "up"}).ok());
  EXPECT_FALSE(ParseKeysFlags({"--calibrate", "--stdin-lines"}).ok());
}

}  // namespace
}  // namespace tickmark::keys

// Evdev input: the record layout against the kernel's published header,
// decoding through a pipe (press, release, autorepeat, SYN_DROPPED, several
// keys), the event time taken from the record, device profiles, hot unplug
// (a record file removed and recreated), and exactly-once delivery through a
// Live stream that drops while the device streams.
#include <fcntl.h>
#include <linux/input.h>
#include <sys/stat.h>
#include <unistd.h>

#include <chrono>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <set>
#include <string>
#include <vector>

#include "clients/keys/button_map.h"
#include "clients/keys/calibrate.h"
#include "clients/keys/device_pump.h"
#include "clients/keys/evdev.h"
#include "gtest/gtest.h"
#include "tests/clients/fake_live.h"

namespace tickmark::keys {
namespace {

namespace fs = std::filesystem;

// Values as published in include/uapi/linux/input.h and
// include/uapi/linux/input-event-codes.h.
constexpr uint16_t kEvSyn = 0;       // input-event-codes.h EV_SYN
constexpr uint16_t kEvKey = 1;       // input-event-codes.h EV_KEY
constexpr uint16_t kEvMsc = 4;       // input-event-codes.h EV_MSC
constexpr uint16_t kSynReport = 0;   // input-event-codes.h SYN_REPORT
constexpr uint16_t kSynDropped = 3;  // input-event-codes.h SYN_DROPPED
constexpr uint16_t kKeyA = 30;       // input-event-codes.h KEY_A
constexpr uint16_t kKeyB = 48;       // input-event-codes.h KEY_B
constexpr uint16_t kKeyPageDown = 109;  // input-event-codes.h KEY_PAGEDOWN

InputRecord Rec(int64_t sec, int64_t usec, uint16_t type, uint16_t code, int32_t value) {
  InputRecord r;
  r.sec = sec;
  r.usec = usec;
  r.type = type;
  r.code = code;
  r.value = value;
  return r;
}

// A key event followed by its SYN_REPORT, as the kernel sends one press:
// EV_MSC MSC_SCAN first, as keyboards do (event-codes.rst, EV_MSC).
std::string KeyFrame(int64_t sec, int64_t usec, uint16_t code, int32_t value) {
  return EncodeInputRecord(Rec(sec, usec, kEvMsc, 4, 0x70004)) +
         EncodeInputRecord(Rec(sec, usec, kEvKey, code, value)) +
         EncodeInputRecord(Rec(sec, usec, kEvSyn, kSynReport, 0));
}

TEST(EvdevLayout, MatchesThePublishedKernelHeader) {
  EXPECT_EQ(kInputEventSize, 24u);        // input.h struct input_event, x86_64
  EXPECT_EQ(kInputEventTypeOffset, 16u);  // after struct timeval (16 bytes)
  EXPECT_EQ(kInputEventCodeOffset, 18u);  // input.h: __u16 code
  EXPECT_EQ(kInputEventValueOffset, 20u); // input.h: __s32 value
  EXPECT_EQ(sizeof(input_event), 24u);    // the installed header agrees
  EXPECT_EQ(EV_SYN, kEvSyn);              // event-codes.rst
  EXPECT_EQ(EV_KEY, kEvKey);              // event-codes.rst
  EXPECT_EQ(EV_MSC, kEvMsc);              // event-codes.rst
  EXPECT_EQ(SYN_REPORT, kSynReport);      // event-codes.rst
  EXPECT_EQ(SYN_DROPPED, kSynDropped);    // event-codes.rst
}

// Regression (found by fuzz/evdev_fuzz.cc): a huge tv_sec from a record file
// overflowed time_ns(); it now saturates.
TEST(EvdevLayout, AbsurdRecordTimesSaturate) {
  InputRecord r;
  r.sec = INT64_MAX / 10;
  EXPECT_EQ(r.time_ns(), INT64_MAX);
  r.sec = INT64_MIN / 10;
  EXPECT_EQ(r.time_ns(), INT64_MIN);
  r.sec = 12;
  r.usec = 345'678;
  EXPECT_EQ(r.time_ns(), 12'345'678'000);
}

TEST(EvdevLayout, DecodesHandWrittenBytes) {
  // Built byte by byte from the published offsets (little-endian x86_64),
  // not from the struct: 1.000250 s, EV_KEY, KEY_PAGEDOWN, press.
  unsigned char b[24] = {};
  b[0] = 1;                        // tv_sec = 1
  b[8] = 0xFA;                     // tv_usec = 250
  b[16] = 1;                       // type EV_KEY at offset 16
  b[18] = kKeyPageDown;            // code at offset 18
  b[20] = 1;                       // value 1 = press at offset 20
  const InputRecord r = DecodeInputRecord(b);
  EXPECT_EQ(r.sec, 1);
  EXPECT_EQ(r.usec, 250);
  EXPECT_EQ(r.type, kEvKey);
  EXPECT_EQ(r.code, kKeyPageDown);
  EXPECT_EQ(r.value, 1);
  EXPECT_EQ(r.time_ns(), 1'000'250'000);
  EXPECT_EQ(EncodeInputRecord(r), std::string(reinterpret_cast<char*>(b), 24));
}

TEST(EvdevNames, KernelCodes) {
  EXPECT_EQ(KeyCodeFromName("KEY_PAGEUP"), uint16_t{104});  // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("KEY_PAGEDOWN"), uint16_t{109}); // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("KEY_LEFT"), uint16_t{105});    // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("KEY_RIGHT"), uint16_t{106});   // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("KEY_A"), kKeyA);               // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("KEY_KP1"), uint16_t{79});      // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("KEY_KP9"), uint16_t{73});      // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("BTN_0"), uint16_t{0x100});     // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("BTN_SOUTH"), uint16_t{0x130}); // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("BTN_EAST"), uint16_t{0x131});  // input-event-codes.h
  EXPECT_EQ(KeyCodeFromName("0x68"), uint16_t{104});
  EXPECT_EQ(KeyCodeFromName("104"), uint16_t{104});
  EXPECT_EQ(KeyCodeFromName("KEY_NOPE"), std::nullopt);
  EXPECT_EQ(KeyCodeName(104), "KEY_PAGEUP");
}

// Writes `bytes` into a pipe in `chunk`-sized writes and decodes what the
// read end delivers, read by read.
std::vector<KeyChange> ThroughPipe(EvdevDecoder& d, const std::string& bytes, size_t chunk) {
  int p[2];
  EXPECT_EQ(pipe(p), 0);
  std::vector<KeyChange> out;
  for (size_t at = 0; at < bytes.size(); at += chunk) {
    const size_t n = std::min(chunk, bytes.size() - at);
    EXPECT_EQ(write(p[1], bytes.data() + at, n), static_cast<ssize_t>(n));
    char buf[256];
    const ssize_t got = read(p[0], buf, sizeof buf);
    EXPECT_EQ(got, static_cast<ssize_t>(n));
    for (const KeyChange& c : d.Feed(std::string_view(buf, static_cast<size_t>(got)))) {
      out.push_back(c);
    }
  }
  close(p[0]);
  close(p[1]);
  return out;
}

TEST(EvdevDecoder, PressRepeatReleaseThroughAPipeInOddChunks) {
  const std::string bytes = KeyFrame(100, 1, kKeyA, 1) +   // press
                            KeyFrame(100, 250001, kKeyA, 2) +  // autorepeat
                            KeyFrame(100, 283001, kKeyA, 2) +
                            KeyFrame(100, 400000, kKeyA, 0);   // release
  for (size_t chunk : {size_t{1}, size_t{7}, size_t{24}, size_t{100}}) {
    EvdevDecoder d;
    const std::vector<KeyChange> c = ThroughPipe(d, bytes, chunk);
    ASSERT_EQ(c.size(), 2u) << "chunk " << chunk;
    EXPECT_EQ(c[0].kind, KeyChange::Kind::kPress);
    EXPECT_EQ(c[0].code, kKeyA);
    // The record's own time, not the read's (the pipe read happens now).
    EXPECT_EQ(c[0].time_ns, 100'000'001'000);
    EXPECT_EQ(c[1].kind, KeyChange::Kind::kRelease);
    EXPECT_EQ(c[1].time_ns, 100'400'000'000);
    EXPECT_EQ(d.autorepeats(), 2u);
    EXPECT_TRUE(d.down().empty());
  }
}

TEST(EvdevDecoder, SeveralKeysInOneFrameAndInterleaved) {
  const std::string both =
      EncodeInputRecord(Rec(5, 10, kEvKey, kKeyA, 1)) +
      EncodeInputRecord(Rec(5, 10, kEvKey, kKeyB, 1)) +
      EncodeInputRecord(Rec(5, 10, kEvSyn, kSynReport, 0)) + KeyFrame(5, 20, kKeyA, 0) +
      KeyFrame(5, 30, kKeyPageDown, 1) + KeyFrame(5, 40, kKeyB, 0) +
      KeyFrame(5, 50, kKeyPageDown, 0);
  EvdevDecoder d;
  const std::vector<KeyChange> c = ThroughPipe(d, both, 13);
  ASSERT_EQ(c.size(), 6u);
  EXPECT_EQ(c[0].code, kKeyA);
  EXPECT_EQ(c[1].code, kKeyB);
  EXPECT_EQ(c[1].kind, KeyChange::Kind::kPress);
  EXPECT_EQ(c[2].kind, KeyChange::Kind::kRelease);
  EXPECT_EQ(c[3].code, kKeyPageDown);
  EXPECT_EQ(c[3].time_ns, 5'000'030'000);
  EXPECT_TRUE(d.down().empty());
  EXPECT_EQ(d.inconsistencies(), 0u);
}

TEST(EvdevDecoder, SynDroppedDiscardsUntilTheNextReportAndAsksForResync) {
  // event-codes.rst: after SYN_DROPPED, events up to and including the next
  // SYN_REPORT are to be dropped and the state queried (EVIOCG*).
  const std::string bytes =
      KeyFrame(1, 0, kKeyA, 1) +
      EncodeInputRecord(Rec(1, 5, kEvKey, kKeyB, 1)) +       // frame cut by the drop
      EncodeInputRecord(Rec(1, 6, kEvSyn, kSynDropped, 0)) +
      EncodeInputRecord(Rec(1, 7, kEvKey, kKeyA, 0)) +        // discarded
      EncodeInputRecord(Rec(1, 8, kEvSyn, kSynReport, 0)) +   // end of the drop
      KeyFrame(1, 9, kKeyPageDown, 1);
  EvdevDecoder d;
  const std::vector<KeyChange> c = ThroughPipe(d, bytes, 24);
  ASSERT_EQ(c.size(), 2u);
  EXPECT_EQ(c[0].code, kKeyA);
  EXPECT_EQ(c[1].code, kKeyPageDown);
  EXPECT_EQ(c[1].time_ns, 1'000'009'000);
  EXPECT_EQ(d.drops(), 1u);
  ASSERT_TRUE(d.TakeResyncRequest());
  EXPECT_FALSE(d.TakeResyncRequest());
  // EVIOCGKEY would say: B held (pressed during the drop), A released.
  d.Resync({kKeyB, kKeyPageDown});
  EXPECT_EQ(d.lost_presses(), 1u);  // B: pressed, but its time is gone
  EXPECT_EQ(d.down(), (std::set<uint16_t>{kKeyB, kKeyPageDown}));
  const std::vector<KeyChange> after = d.Feed(KeyFrame(1, 20, kKeyB, 0));
  ASSERT_EQ(after.size(), 1u);
  EXPECT_EQ(after[0].kind, KeyChange::Kind::kRelease);
  EXPECT_EQ(d.inconsistencies(), 0u);
}

TEST(DeviceProfiles, ShippedProfilesLoad) {
  const std::string dir = std::string(TICKMARK_SOURCE_DIR) + "/clients/keys/profiles/";
  auto clicker = ButtonMap::FromTomlFile(dir + "clicker.toml", ButtonMap::EvdevNamer());
  ASSERT_TRUE(clicker.ok()) << clicker.status();
  EXPECT_EQ(clicker->Find("KEY_PAGEDOWN")->value, 1.0);
  EXPECT_EQ(clicker->Find("KEY_RIGHT")->value, 1.0);
  EXPECT_EQ(clicker->Find("KEY_PAGEUP")->value, -1.0);
  EXPECT_EQ(clicker->Find("KEY_LEFT")->value, -1.0);
  auto pedal = ButtonMap::FromTomlFile(dir + "foot-pedal.toml", ButtonMap::EvdevNamer());
  ASSERT_TRUE(pedal.ok()) << pedal.status();
  EXPECT_EQ(pedal->Find("BTN_0")->value, 1.0);
  EXPECT_EQ(pedal->Find("KEY_B")->value, -1.0);
  auto pad = ButtonMap::FromTomlFile(dir + "gamepad.toml", ButtonMap::EvdevNamer());
  ASSERT_TRUE(pad.ok()) << pad.status();
  EXPECT_EQ(pad->Find("BTN_SOUTH")->value, 1.0);
  EXPECT_EQ(pad->Find("BTN_SELECT")->action, Binding::Action::kQuit);
  auto numpad = ButtonMap::FromTomlFile(dir + "numpad.toml", ButtonMap::EvdevNamer());
  ASSERT_TRUE(numpad.ok()) << numpad.status();
  EXPECT_EQ(numpad->Find("KEY_KP1")->value, -1.0);
  EXPECT_EQ(numpad->Find("KEY_KP5")->value, 0.0);
  EXPECT_EQ(numpad->Find("KEY_KP9")->value, 1.0);
  EXPECT_EQ(numpad->bindings().size(), 9u);
}

TEST(DeviceProfiles, ErrorsNameTheLine) {
  const auto n = ButtonMap::EvdevNamer();
  auto unknown = ButtonMap::FromToml("[[binding]]\nbuttons = [\"KEY_NOPE\"]\nvalue = 1\n", "p", n);
  ASSERT_FALSE(unknown.ok());
  EXPECT_NE(unknown.status().message().find("p:2:"), std::string_view::npos);
  auto twice = ButtonMap::FromToml(
      "[[binding]]\nbuttons = [\"KEY_A\"]\nvalue = 1\n"
      "[[binding]]\nbuttons = [\"30\"]\nvalue = -1\n", "p", n);  // 30 is KEY_A
  EXPECT_FALSE(twice.ok());
  auto range = ButtonMap::FromToml("[[binding]]\nbuttons = [\"KEY_A\"]\nvalue = 1001\n", "p", n);
  EXPECT_FALSE(range.ok());
  auto field = ButtonMap::FromToml("[[binding]]\nbutons = [\"KEY_A\"]\nvalue = 1\n", "p", n);
  EXPECT_FALSE(field.ok());
}

class TempDir {
 public:
  TempDir() {
    char tmpl[] = "/tmp/tickmark-evdev-XXXXXX";
    path_ = mkdtemp(tmpl);
  }
  ~TempDir() { fs::remove_all(path_); }
  const std::string& path() const { return path_; }

 private:
  std::string path_;
};

void Append(const std::string& path, const std::string& bytes) {
  std::ofstream out(path, std::ios::binary | std::ios::app);
  out << bytes;
}

using Clock = std::chrono::steady_clock;

TEST(DeviceSelection, ByPathNameAndListing) {
  TempDir dir;
  Append(dir.path() + "/event3", "");
  Append(dir.path() + "/event7", "");
  Append(dir.path() + "/mouse0", "");  // not an event node
  const std::vector<DeviceInfo> list = ListDevices(dir.path());
  ASSERT_EQ(list.size(), 2u);
  EXPECT_EQ(list[0].name, "event3");
  EXPECT_FALSE(list[0].is_device);
  EXPECT_EQ(*DeviceSelector{"event7"}.Match(list), dir.path() + "/event7");
  EXPECT_FALSE(DeviceSelector{"event"}.Match(list).ok());  // ambiguous
  EXPECT_FALSE(DeviceSelector{"046d:c52b"}.Match(list).ok());
  EXPECT_NE(FormatDeviceList(list, false).find("event7"), std::string::npos);
}

TEST(EvdevDevice, SurvivesUnplugAndReplug) {
  TempDir dir;
  const std::string path = dir.path() + "/event0";
  Append(path, KeyFrame(10, 0, kKeyA, 1) + KeyFrame(10, 100, kKeyA, 0));
  EvdevDevice dev({DeviceSelector{path}, dir.path(), false});
  ASSERT_TRUE(dev.Open().ok());
  std::vector<KeyChange> seen;
  bool gone = false;
  bool back = false;
  const auto deadline = Clock::now() + std::chrono::seconds(20);
  while (Clock::now() < deadline && seen.size() < 2) {
    for (const KeyChange& c : dev.Poll(50).changes) seen.push_back(c);
  }
  ASSERT_EQ(seen.size(), 2u);
  // Unplug: the node disappears; a new one appears at the same path.
  fs::remove(path);
  while (Clock::now() < deadline && !gone) gone = dev.Poll(50).disconnected;
  ASSERT_TRUE(gone);
  EXPECT_FALSE(dev.is_open());
  Append(path, KeyFrame(11, 0, kKeyPageDown, 1));
  while (Clock::now() < deadline && seen.size() < 3) {
    EvdevDevice::Batch b = dev.Poll(50);
    back = back || b.connected;
    for (const KeyChange& c : b.changes) seen.push_back(c);
  }
  EXPECT_TRUE(back);
  ASSERT_EQ(seen.size(), 3u);
  EXPECT_EQ(seen[2].code, kKeyPageDown);
  EXPECT_EQ(seen[2].time_ns, 11'000'000'000);
  EXPECT_EQ(dev.reopens(), 1u);
}

TEST(DevicePump, EveryPressArrivesOnceWhileTheStreamDrops) {
  testing::FakeLive live;
  const std::string target = live.Start();
  live.Edit([](testing::FakeLive::Script& s) {
    s.drop_after = 3;  // end the stream after every third message
    s.max_drops = 4;
  });
  client::StreamOptions o;
  o.target = target;
  o.token = "tm_test_token";
  o.client_id = "evdev-test";
  o.source = {tickmark::v1::SOURCE_KIND_INPUT_DEVICE, "test", "evdev_test"};
  o.credentials = grpc::InsecureChannelCredentials();
  o.initial_backoff = Duration::Millis(1);
  o.max_backoff = Duration::Millis(20);
  client::TrainerClient client;
  ASSERT_TRUE(client.Connect(o).ok());

  TempDir dir;
  const std::string path = dir.path() + "/event0";
  constexpr int kPresses = 20;
  std::string bytes;
  for (int i = 0; i < kPresses; ++i) {
    const uint16_t key = i % 2 == 0 ? kKeyPageDown : uint16_t{104};  // KEY_PAGEUP
    bytes += KeyFrame(50, i * 1000, key, 1) + KeyFrame(50, i * 1000 + 500, key, 0);
  }
  Append(path, bytes);
  auto map = ButtonMap::FromTomlFile(
      std::string(TICKMARK_SOURCE_DIR) + "/clients/keys/profiles/clicker.toml",
      ButtonMap::EvdevNamer());
  ASSERT_TRUE(map.ok());
  EvdevDevice dev({DeviceSelector{path}, dir.path(), false});
  ASSERT_TRUE(dev.Open().ok());
  DevicePump pump(&dev, &*map, &client);
  const auto deadline = Clock::now() + std::chrono::seconds(30);
  while (Clock::now() < deadline && pump.sent() < kPresses) pump.Step(50);
  ASSERT_EQ(pump.sent(), static_cast<uint64_t>(kPresses));
  ASSERT_TRUE(client.Flush(Clock::now() + std::chrono::seconds(30)).ok());
  EXPECT_GE(live.drops(), 1);
  const auto stored = live.stored();
  ASSERT_EQ(stored.size(), static_cast<size_t>(kPresses));
  for (const auto& [key, times] : stored) EXPECT_EQ(times, 1);
  for (const auto& [key, body] : live.bodies()) {
    tickmark::v1::TrainerMessage m;
    ASSERT_TRUE(m.ParseFromString(body));
    const int64_t i = static_cast<int64_t>(key.second) - 1;
    // Kernel time from the record, value from clicker.toml.
    EXPECT_EQ(m.feedback().event_source_ns(), 50'000'000'000 + i * 1'000'000);
    EXPECT_EQ(m.feedback().value(), i % 2 == 0 ? 1.0 : -1.0);
  }
  EXPECT_NE(pump.Report().find("read time - event time"), std::string::npos);
  EXPECT_TRUE(client.Close(Clock::now() + std::chrono::seconds(5)).ok());
}

// tickmark-keys --calibrate --device: presses become calibration answers
// stamped with the records' own (kernel) times, not the read time; releases
// and unbound keys give nothing; a quit button quits.
TEST(CalibrationDeviceAnswers, PressesAreAnswersAtTheirKernelTimes) {
  TempDir dir;
  const std::string path = dir.path() + "/event0";
  constexpr uint16_t kKeyPageUp = 104;  // input-event-codes.h KEY_PAGEUP
  constexpr uint16_t kKeyEsc = 1;       // input-event-codes.h KEY_ESC
  Append(path, KeyFrame(7, 250, kKeyPageDown, 1) + KeyFrame(7, 300, kKeyPageDown, 0) +
                   KeyFrame(8, 0, kKeyA, 1) + KeyFrame(8, 10, kKeyA, 0) +
                   KeyFrame(9, 500, kKeyPageUp, 1) + KeyFrame(9, 600, kKeyPageUp, 0) +
                   KeyFrame(10, 0, kKeyEsc, 1));
  auto map = ButtonMap::FromToml(
      "[[binding]]\nbuttons = [\"KEY_PAGEDOWN\"]\nvalue = 1.0\nlabel = \"approve\"\n"
      "[[binding]]\nbuttons = [\"KEY_PAGEUP\"]\nvalue = -1.0\nlabel = \"disapprove\"\n"
      "[[binding]]\nbuttons = [\"KEY_ESC\"]\naction = \"quit\"\n",
      "test", ButtonMap::EvdevNamer());
  ASSERT_TRUE(map.ok()) << map.status();
  auto answers = DeviceAnswers({DeviceSelector{path}, dir.path(), false}, &*map);
  ASSERT_TRUE(answers.ok()) << answers.status();
  EXPECT_EQ((*answers)->ApproveInputs(), "KEY_PAGEDOWN");
  EXPECT_EQ((*answers)->DisapproveInputs(), "KEY_PAGEUP");
  std::vector<client::CalibrationInputAnswer> got;
  bool quit = false;
  const auto deadline = Clock::now() + std::chrono::seconds(20);
  while (Clock::now() < deadline && !quit) {
    client::CalibrationInput in = (*answers)->Poll(50, -1);
    got.insert(got.end(), in.answers.begin(), in.answers.end());
    quit = quit || in.quit;
  }
  EXPECT_TRUE(quit);
  ASSERT_EQ(got.size(), 2u);
  EXPECT_TRUE(got[0].approve);
  EXPECT_EQ(got[0].at_ns, 7'000'250'000);
  EXPECT_EQ(got[0].input, "evdev:KEY_PAGEDOWN");
  EXPECT_FALSE(got[1].approve);
  EXPECT_EQ(got[1].at_ns, 9'000'500'000);
}

}  // namespace
}  // namespace tickmark::keys

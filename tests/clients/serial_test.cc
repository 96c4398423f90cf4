// Serial response boxes: the line and raw protocols fed bytes (garbage, a
// line cut in half, a fragment left by silence), the box clock model on
// constructed delays, the shipped profiles, and both protocols end to end
// through a pty pair (openpty) with Boost.Asio's serial_port on the slave.
#include <pty.h>
#include <unistd.h>

#include <chrono>
#include <memory>
#include <string>
#include <vector>

#include "clients/serial/serial_protocol.h"
#include "clients/serial/serial_source.h"
#include "gtest/gtest.h"

namespace tickmark::serial {
namespace {

using Clock = std::chrono::steady_clock;

TEST(BoxLine, Parses) {
  auto e = ParseBoxLine("B1 down 123456");
  ASSERT_TRUE(e.has_value());
  EXPECT_EQ(e->button, "B1");
  EXPECT_TRUE(e->pressed);
  EXPECT_EQ(e->box_us, int64_t{123456});
  auto up = ParseBoxLine("B2  up");
  ASSERT_TRUE(up.has_value());
  EXPECT_FALSE(up->pressed);
  EXPECT_FALSE(up->box_us.has_value());
  EXPECT_FALSE(ParseBoxLine("B1 sideways 5").has_value());
  EXPECT_FALSE(ParseBoxLine("B1 down 12x").has_value());
  EXPECT_FALSE(ParseBoxLine("B1 down -5").has_value());
  EXPECT_FALSE(ParseBoxLine("B-1 down").has_value());
  EXPECT_FALSE(ParseBoxLine("B1").has_value());
  EXPECT_FALSE(ParseBoxLine("B1 down 5 extra").has_value());
}

// Regression (found by fuzz/serial_protocol_fuzz.cc): a box timestamp above
// about 9.2e15 µs overflowed BoxClock's nanosecond arithmetic.
TEST(BoxLine, TimestampTooLargeForNanosecondsIsGarbage) {
  EXPECT_FALSE(ParseBoxLine("B9 down 0000189399123359065702").has_value());
  EXPECT_FALSE(ParseBoxLine("B9 down 9223372036854775807").has_value());
  auto last = ParseBoxLine("B9 down 1000000000000000");  // kMaxBoxMicros itself
  ASSERT_TRUE(last.has_value());
  BoxClock clock;
  EXPECT_EQ(clock.ToHost(*last->box_us, 5), 5);  // one sample: its own offset
}

TEST(LineProtocol, SplitLineGarbageAndOverlongLines) {
  LineProtocol p;
  EXPECT_TRUE(p.Feed("B1 do", 100).empty());  // a line cut in half
  std::vector<BoxEvent> e = p.Feed("wn 42\r\n", 200);
  ASSERT_EQ(e.size(), 1u);
  EXPECT_EQ(e[0].button, "B1");
  EXPECT_EQ(e[0].box_us, int64_t{42});
  EXPECT_EQ(e[0].host_ns, 200);  // received when its end arrived
  e = p.Feed(std::string("\x01\xff\xfe junk\n\nB2 down\n", 18), 300);
  ASSERT_EQ(e.size(), 1u);  // the junk line is garbage, the blank line nothing
  EXPECT_EQ(e[0].button, "B2");
  EXPECT_EQ(p.garbage_lines(), 1u);
  EXPECT_EQ(p.last_garbage().substr(0, 8), "\\x01\\xff");
  e = p.Feed(std::string(kMaxLine + 10, 'B') + "\nB3 up\n", 400);
  ASSERT_EQ(e.size(), 1u);
  EXPECT_EQ(e[0].button, "B3");
  EXPECT_EQ(p.garbage_lines(), 2u);
}

TEST(LineProtocol, FragmentLeftBySilenceIsDropped) {
  LineProtocol p(/*stale_ns=*/1'000'000'000);
  EXPECT_TRUE(p.Feed("B1 do", 0).empty());  // the box resets mid-line
  // Two seconds later it speaks again from a clean start.
  std::vector<BoxEvent> e = p.Feed("B2 down 7\n", 2'000'000'000);
  ASSERT_EQ(e.size(), 1u);
  EXPECT_EQ(e[0].button, "B2");
  EXPECT_EQ(p.stale_fragments(), 1u);
  EXPECT_EQ(p.garbage_lines(), 0u);
}

TEST(RawProtocol, OneByteOnePress) {
  RawProtocol p;
  std::vector<BoxEvent> e = p.Feed(std::string("1A\x00", 3), 5);
  ASSERT_EQ(e.size(), 3u);
  EXPECT_EQ(e[0].button, "0x31");  // ASCII '1'
  EXPECT_EQ(e[1].button, "0x41");  // ASCII 'A'
  EXPECT_EQ(e[2].button, "0x00");
  EXPECT_EQ(e[2].host_ns, 5);
}

TEST(BoxClock, MinFilterRemovesTheVaryingDelay) {
  // Constructed: host = box + 5 s; transit = 2 ms minimum plus 0..6 ms of
  // varying delay. The mapped time is the press's host time plus the minimum
  // transit once the minimum has been seen.
  BoxClock c;
  const int64_t offset = 5'000'000'000;
  const int64_t min_transit = 2'000'000;
  const int64_t extra[] = {6'000'000, 0, 3'000'000, 1'000'000, 5'000'000};
  int64_t box_us = 1'000;
  std::vector<int64_t> mapped;
  for (int64_t x : extra) {
    box_us += 250'000;
    const int64_t host = box_us * 1000 + offset + min_transit + x;
    mapped.push_back(c.ToHost(box_us, host) - (box_us * 1000 + offset));
  }
  EXPECT_EQ(mapped[0], min_transit + 6'000'000);  // only one sample yet
  for (size_t i = 1; i < mapped.size(); ++i) EXPECT_EQ(mapped[i], min_transit);
  EXPECT_EQ(c.Excess(box_us, box_us * 1000 + offset + min_transit + 5'000'000), 5'000'000);
  // Never later than the receive time: the current sample bounds the minimum.
  EXPECT_EQ(c.resets(), 0u);
  c.ToHost(10, 9'000'000'000);  // the box restarted: its clock went back
  EXPECT_EQ(c.resets(), 1u);
  EXPECT_EQ(c.samples(), 1u);
}

TEST(BoxClock, ABurstReadAtOnceKeepsTheBoxSpacing) {
  // Three lines 100 ms apart on the box, delivered in one read (the port
  // stalled): added first, mapped after, they keep their spacing and the
  // last one lands on the receive time.
  BoxClock c;
  const int64_t host = 50'000'000'000;
  for (int64_t us : {1'000'000, 1'100'000, 1'200'000}) c.Add(us, host);
  EXPECT_EQ(c.Map(1'000'000), host - 200'000'000);
  EXPECT_EQ(c.Map(1'100'000), host - 100'000'000);
  EXPECT_EQ(c.Map(1'200'000), host);
}

TEST(SerialProfiles, ShippedProfilesLoad) {
  const std::string dir = std::string(TICKMARK_SOURCE_DIR) + "/clients/serial/profiles/";
  auto line = LoadSerialProfile(dir + "line-box.toml");
  ASSERT_TRUE(line.ok()) << line.status();
  EXPECT_EQ(line->settings.protocol, PortSettings::Protocol::kLine);
  EXPECT_EQ(line->settings.baud, 115200u);
  EXPECT_EQ(line->buttons.Find("B1")->value, 1.0);
  auto raw = LoadSerialProfile(dir + "raw-box.toml");
  ASSERT_TRUE(raw.ok()) << raw.status();
  EXPECT_EQ(raw->settings.protocol, PortSettings::Protocol::kRaw);
  EXPECT_EQ(raw->buttons.Find("0x31")->value, 1.0);  // "1" made canonical
  EXPECT_EQ(raw->buttons.Find("0x42")->value, -1.0);
  EXPECT_FALSE(ParseSerialProfile("[serial]\nparity = \"mark\"\n[[binding]]\nbuttons=[\"B1\"]\nvalue=1\n",
                                  "p").ok());
  EXPECT_FALSE(ParseSerialProfile("[serial]\nbaud = 9600\nspeed = 1\n[[binding]]\nbuttons=[\"B1\"]\nvalue=1\n",
                                  "p").ok());
}

// A pty pair: the test writes the box's bytes into the master; SerialSource
// opens the slave by name, as it would /dev/ttyUSB0.
class Pty {
 public:
  Pty() {
    char name[256] = {};
    EXPECT_EQ(openpty(&master_, &slave_, name, nullptr, nullptr), 0);
    name_ = name;
  }
  ~Pty() {
    close(master_);
    close(slave_);
  }
  void Write(const std::string& s) {
    EXPECT_EQ(write(master_, s.data(), s.size()), static_cast<ssize_t>(s.size()));
  }
  const std::string& name() const { return name_; }

 private:
  int master_ = -1;
  int slave_ = -1;
  std::string name_;
};

// Polls until `want` presses arrived or 20 s passed.
std::vector<TimedPress> Collect(SerialSource& s, size_t want) {
  std::vector<TimedPress> out;
  const auto deadline = Clock::now() + std::chrono::seconds(20);
  while (out.size() < want && Clock::now() < deadline) {
    for (TimedPress& p : s.Poll(50).presses) out.push_back(std::move(p));
  }
  return out;
}

TEST(SerialPty, LineProtocolWithGarbageSplitLineAndSilence) {
  Pty pty;
  PortSettings settings;  // 115200 8N1, line protocol
  SerialSource src(pty.name(), settings);
  ASSERT_TRUE(src.Open().ok());
  pty.Write("B1 down 1000\n\x07\x7f##\nB1 up 1200\nB2 do");
  std::vector<TimedPress> got = Collect(src, 2);
  ASSERT_EQ(got.size(), 2u);
  EXPECT_EQ(got[0].event.button, "B1");
  EXPECT_TRUE(got[0].from_box_clock);
  EXPECT_FALSE(got[1].event.pressed);
  // The second half of the cut line; then silence: polls return nothing and
  // the port stays open.
  pty.Write("wn 5000\n");
  got = Collect(src, 1);
  ASSERT_EQ(got.size(), 1u);
  EXPECT_EQ(got[0].event.button, "B2");
  EXPECT_EQ(got[0].event.box_us, int64_t{5000});
  // Mapped box time is never after the receive time.
  EXPECT_LE(got[0].event_ns, got[0].event.host_ns);
  for (int i = 0; i < 3; ++i) EXPECT_TRUE(src.Poll(10).presses.empty());
  EXPECT_TRUE(src.is_open());
  EXPECT_EQ(src.line_protocol().garbage_lines(), 1u);
  // The box comes back: with no timestamp, the receive time is used.
  pty.Write("B3 down\n");
  got = Collect(src, 1);
  ASSERT_EQ(got.size(), 1u);
  EXPECT_EQ(got[0].event.button, "B3");
  EXPECT_FALSE(got[0].from_box_clock);
  EXPECT_EQ(got[0].event_ns, got[0].event.host_ns);
  EXPECT_NE(src.Report().find("garbage lines 1"), std::string::npos);
}

TEST(SerialPty, RawProtocolAtOtherSettings) {
  Pty pty;
  PortSettings settings;
  settings.protocol = PortSettings::Protocol::kRaw;
  settings.baud = 9600;
  settings.parity = "even";
  settings.stop_bits = "2";
  settings.data_bits = 8;
  SerialSource src(pty.name(), settings);
  ASSERT_TRUE(src.Open().ok());
  pty.Write("12");
  pty.Write(std::string("\xff", 1));  // a byte no profile binds: still an event
  std::vector<TimedPress> got = Collect(src, 3);
  ASSERT_EQ(got.size(), 3u);
  EXPECT_EQ(got[0].event.button, "0x31");
  EXPECT_EQ(got[1].event.button, "0x32");
  EXPECT_EQ(got[2].event.button, "0xff");
  EXPECT_FALSE(got[0].from_box_clock);
}

TEST(SerialPty, UnpluggedPortIsReopenedWhenItReturns) {
  // The port is reached through a link, as /dev/serial/by-id/... links are;
  // "unplugging" closes the pty (reads fail), "re-plugging" links a new one.
  char tmpl[] = "/tmp/tickmark-serial-XXXXXX";
  const std::string dir = mkdtemp(tmpl);
  const std::string link = dir + "/box";
  auto first = std::make_unique<Pty>();
  ASSERT_EQ(symlink(first->name().c_str(), link.c_str()), 0);
  SerialSource src(link, PortSettings{});
  ASSERT_TRUE(src.Open().ok());
  first->Write("B1 down\n");
  ASSERT_EQ(Collect(src, 1).size(), 1u);
  first.reset();  // unplugged
  bool gone = false;
  const auto deadline = Clock::now() + std::chrono::seconds(20);
  while (!gone && Clock::now() < deadline) gone = src.Poll(50).disconnected;
  ASSERT_TRUE(gone);
  EXPECT_FALSE(src.is_open());
  Pty second;
  unlink(link.c_str());
  ASSERT_EQ(symlink(second.name().c_str(), link.c_str()), 0);
  second.Write("B2 down\n");
  std::vector<TimedPress> got = Collect(src, 1);  // Poll reopens, then reads
  ASSERT_EQ(got.size(), 1u);
  EXPECT_EQ(got[0].event.button, "B2");
  unlink(link.c_str());
  rmdir(dir.c_str());
}

TEST(SerialPty, MissingPortIsRetried) {
  SerialSource src("/nonexistent/ttyUSB9", PortSettings{});
  EXPECT_FALSE(src.Open().ok());
  SerialSource::Batch b = src.Poll(1);
  EXPECT_FALSE(b.connected);
  EXPECT_FALSE(src.is_open());
}

}  // namespace
}  // namespace tickmark::serial

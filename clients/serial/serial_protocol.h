// What a serial response box says, decoded without I/O, and the model of the
// box's own clock.
//
// Line protocol: one press or release per line, "<BUTTON> <down|up> [TIME]",
// e.g. "B1 down 123456", where TIME (optional) is the box's own clock in
// microseconds. Buttons are 1..16 of [A-Za-z0-9_]. Lines end in "\n" ("\r"
// ignored). Anything else is garbage: counted, reported, never guessed at.
// A line longer than kMaxLine is garbage up to its end. Bytes of a line that
// was cut off (the box reset mid-line) are dropped when new bytes arrive more
// than `stale_ns` after them, so the fragment is not glued onto the next line.
//
// Raw protocol: every byte is one press of button "0xNN" (its value); boxes
// of this kind send nothing on release.
//
// BoxClock maps box timestamps to the host's CLOCK_MONOTONIC. The box clock
// is not the host's, so box times are not sent as event times. For each line,
// host_receive − box_time = offset + transit delay; the smallest value over a
// sliding window (a min filter) is the offset plus the smallest transit
// (the line's own transmission time and USB latency), and a window of recent
// samples (the last 30 s of box time) follows a slow drift between the two
// crystals: a drift of D ppm can bias the result by up to D ppm of the
// window, 1.5 ms at 50 ppm (when presses are sparser than the window, the
// model falls back to the receive time). Event time =
// box_time + that minimum: the press's host time, late by the minimum transit
// (unknown, stated in the report), but free of the varying part of the delay
// (USB polling, the program's scheduling). A box whose clock jumps back (it
// was reset or wrapped) starts a new window.
//
// All classes are values, thread-compatible.
#ifndef TICKMARK_CLIENTS_SERIAL_SERIAL_PROTOCOL_H_
#define TICKMARK_CLIENTS_SERIAL_SERIAL_PROTOCOL_H_

#include <cstddef>
#include <cstdint>
#include <deque>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

namespace tickmark::serial {

inline constexpr size_t kMaxLine = 128;
// The largest box timestamp taken (about 31.7 years of box uptime, in µs):
// larger ones are garbage, and in nanoseconds they would overflow the
// arithmetic of BoxClock.
inline constexpr int64_t kMaxBoxMicros = 1'000'000'000'000'000;

struct BoxEvent {
  std::string button;   // "B1"; "0x31" from the raw protocol
  bool pressed = true;
  std::optional<int64_t> box_us;  // the box's timestamp, if it sent one
  int64_t host_ns = 0;            // host clock when the bytes were read
};

class LineProtocol {
 public:
  explicit LineProtocol(int64_t stale_ns = 1'000'000'000) : stale_ns_(stale_ns) {}
  // `host_ns`: when read() returned these bytes.
  std::vector<BoxEvent> Feed(std::string_view bytes, int64_t host_ns);

  uint64_t garbage_lines() const { return garbage_; }
  uint64_t stale_fragments() const { return stale_; }
  const std::string& last_garbage() const { return last_garbage_; }

 private:
  void EndLine(int64_t host_ns, std::vector<BoxEvent>* out);

  int64_t stale_ns_;
  std::string line_;
  bool overlong_ = false;
  int64_t last_bytes_ns_ = 0;
  uint64_t garbage_ = 0;
  uint64_t stale_ = 0;
  std::string last_garbage_;
};

// Parses one complete line; nullopt for garbage.
std::optional<BoxEvent> ParseBoxLine(std::string_view line);

class RawProtocol {
 public:
  std::vector<BoxEvent> Feed(std::string_view bytes, int64_t host_ns);
};

// "0x31" for byte 0x31.
std::string RawButtonName(unsigned char byte);

class BoxClock {
 public:
  explicit BoxClock(int64_t window_ns = 30'000'000'000, size_t max_samples = 256)
      : window_ns_(window_ns), max_samples_(max_samples) {}
  // Adds a sample: box timestamp received at host_ns.
  void Add(int64_t box_us, int64_t host_ns);
  // Host time of a box timestamp, with the samples added so far. Add every
  // line of one read before mapping any of them: in a burst the last line
  // bounds the offset best, and mapping early lines before seeing it would
  // squash the burst onto one instant.
  int64_t Map(int64_t box_us) const;
  // Add then Map.
  int64_t ToHost(int64_t box_us, int64_t host_ns);
  // Receive − mapped time of a sample: the varying part of the delay that
  // the model removed (for the report).
  int64_t Excess(int64_t box_us, int64_t host_ns) const { return host_ns - Map(box_us); }
  uint64_t resets() const { return resets_; }
  size_t samples() const { return samples_.size(); }

 private:
  struct Sample {
    int64_t box_ns;
    int64_t offset_ns;  // host_receive − box time
  };
  int64_t window_ns_;
  size_t max_samples_;
  std::deque<Sample> samples_;
  int64_t min_offset_ns_ = 0;
  uint64_t resets_ = 0;
};

}  // namespace tickmark::serial

#endif  // TICKMARK_CLIENTS_SERIAL_SERIAL_PROTOCOL_H_

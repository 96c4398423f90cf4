// SerialSource: a response box on a serial port (Boost.Asio serial_port:
// baud, parity, stop bits, character size), decoded with the line or raw
// protocol (serial_protocol.h) into timed presses. It reopens the port when
// it disappears (a USB adapter unplugged) and comes back.
//
// Also the profile of tickmark-serial: a ButtonMap (clients/keys/button_map.h)
// plus a [serial] table:
//   [serial]
//   protocol = "line"      # or "raw"
//   baud = 115200
//   parity = "none"        # "even", "odd"
//   stop_bits = 1          # 1, 1.5, 2
//   data_bits = 8          # 5..8
//   box_clock = true       # line protocol: use the box's timestamps if sent
//
// Not thread-safe: one thread calls Poll().
#ifndef TICKMARK_CLIENTS_SERIAL_SERIAL_SOURCE_H_
#define TICKMARK_CLIENTS_SERIAL_SERIAL_SOURCE_H_

#include <cstdint>
#include <memory>
#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "clients/keys/button_map.h"
#include "clients/serial/serial_protocol.h"

namespace tickmark::serial {

struct PortSettings {
  enum class Protocol { kLine, kRaw };
  Protocol protocol = Protocol::kLine;
  unsigned baud = 115200;
  std::string parity = "none";   // none, even, odd
  std::string stop_bits = "1";   // 1, 1.5, 2
  unsigned data_bits = 8;
  bool box_clock = true;
};

struct SerialProfile {
  PortSettings settings;
  keys::ButtonMap buttons;
};

// Button names: the line protocol's names as written (B1); for raw, a byte
// as "0x31" or one printable character ("1").
keys::ButtonMap::Namer SerialNamer(PortSettings::Protocol protocol);
absl::StatusOr<SerialProfile> ParseSerialProfile(std::string_view text,
                                                 std::string_view source_name);
absl::StatusOr<SerialProfile> LoadSerialProfile(const std::string& path);

// A timed press or release, ready to map.
struct TimedPress {
  BoxEvent event;
  int64_t event_ns = 0;     // host CLOCK_MONOTONIC: box time mapped, else receive time
  bool from_box_clock = false;
};

class SerialSource {
 public:
  struct Batch {
    std::vector<TimedPress> presses;
    bool connected = false;
    bool disconnected = false;
    std::vector<std::string> notes;
  };

  SerialSource(std::string path, PortSettings settings);
  ~SerialSource();
  SerialSource(const SerialSource&) = delete;
  SerialSource& operator=(const SerialSource&) = delete;

  absl::Status Open();
  // Waits up to timeout_ms for bytes (or, when closed, tries to reopen).
  Batch Poll(int timeout_ms, int wake_fd = -1);

  bool is_open() const;
  const LineProtocol& line_protocol() const { return line_; }
  const BoxClock& box_clock() const { return clock_; }
  // Nanoseconds since the last byte, for "silent for" in the status.
  int64_t silent_ns(int64_t now_ns) const { return last_byte_ns_ == 0 ? 0 : now_ns - last_byte_ns_; }
  // Event-time figures for the --verbose report.
  struct Stats {
    uint64_t presses = 0;
    uint64_t from_box = 0;
    int64_t max_excess_ns = 0;   // largest delay variation removed by BoxClock
    double sum_excess_ns = 0;
  };
  const Stats& stats() const { return stats_; }
  std::string Report() const;

 private:
  struct Port;
  void Close();

  std::string path_;
  PortSettings settings_;
  std::unique_ptr<Port> port_;
  LineProtocol line_;
  RawProtocol raw_;
  BoxClock clock_;
  int64_t last_byte_ns_ = 0;
  uint64_t garbage_seen_ = 0;
  uint64_t stale_seen_ = 0;
  uint64_t resets_seen_ = 0;
  Stats stats_;
};

}  // namespace tickmark::serial

#endif  // TICKMARK_CLIENTS_SERIAL_SERIAL_SOURCE_H_

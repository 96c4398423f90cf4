// Linux input devices (evdev): decoding struct input_event records, key
// names, and the device I/O that feeds the decoder.
//
// EvdevDecoder does no I/O: it is fed the bytes read() returns (any split)
// and hands back key presses and releases stamped with the record's own
// timestamp — the kernel's time of the event, not the time of the read. With
// EVIOCSCLOCKID(CLOCK_MONOTONIC) that timestamp is on the clock the client
// answers probes with (tickmark::SystemMonotonic, server/core/time.h).
//
// Rules (kernel Documentation/input/event-codes.rst): events between two
// SYN_REPORTs form one frame and are applied at the SYN_REPORT; EV_KEY value
// 2 (autorepeat) is ignored; after SYN_DROPPED everything up to and including
// the next SYN_REPORT is discarded, the drop is counted, and the caller
// should resync key state with EVIOCGKEY (Resync()) when a device is open.
//
// EvdevDevice opens a device by path, name or vendor:product id, sets the
// clock and the optional grab, and reads. A path that is not a character
// device (a regular file or FIFO of input_event records, for tests) is read
// the same way with the ioctls skipped. EvdevDevice detects unplugging (ENODEV,
// the path gone or replaced) and reopens the same device when it reappears.
//
// All classes are thread-compatible: one instance per reading thread.
#ifndef TICKMARK_CLIENTS_KEYS_EVDEV_H_
#define TICKMARK_CLIENTS_KEYS_EVDEV_H_

#include <sys/types.h>

#include <cstddef>
#include <cstdint>
#include <optional>
#include <set>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/statusor.h"

namespace tickmark::keys {

// include/uapi/linux/input.h, struct input_event on 64-bit Linux.
inline constexpr size_t kInputEventSize = 24;
inline constexpr size_t kInputEventTypeOffset = 16;
inline constexpr size_t kInputEventCodeOffset = 18;
inline constexpr size_t kInputEventValueOffset = 20;

// One struct input_event, as read.
struct InputRecord {
  int64_t sec = 0;
  int64_t usec = 0;
  uint16_t type = 0;
  uint16_t code = 0;
  int32_t value = 0;
  // The record's time in nanoseconds, saturated at the int64 limits: the
  // kernel never sends such times, but records also come from files and
  // FIFOs (--device), and an absurd one must not overflow.
  int64_t time_ns() const;
};

// Reads one record from exactly kInputEventSize bytes (host byte order).
InputRecord DecodeInputRecord(const unsigned char* bytes);
// The bytes of a record (for tests and fakes).
std::string EncodeInputRecord(const InputRecord& r);

// "KEY_PAGEUP" → 104; also "104" and "0x68". nullopt for an unknown name.
std::optional<uint16_t> KeyCodeFromName(std::string_view name);
// 104 → "KEY_PAGEUP"; an unnamed code gives "0x..." .
std::string KeyCodeName(uint16_t code);

struct KeyChange {
  enum class Kind { kPress, kRelease };
  Kind kind = Kind::kPress;
  uint16_t code = 0;
  int64_t time_ns = 0;  // the record's timestamp (kernel time of the event)
};

class EvdevDecoder {
 public:
  // Decodes the records completed by `bytes`; a record split across calls
  // is completed by the next call.
  std::vector<KeyChange> Feed(std::string_view bytes);

  // After a SYN_DROPPED: the keys the device reports down (EVIOCGKEY).
  // Presses lost in the drop cannot be timed, so they are not returned as
  // presses; they are counted in lost_presses(). Keys released during the
  // drop are forgotten quietly.
  void Resync(const std::set<uint16_t>& down_now);

  // A fresh start on a newly opened device: no partial record, no pending
  // frame, `down_now` held (not counted as lost).
  void Reset(const std::set<uint16_t>& down_now);

  // True between a SYN_DROPPED and its SYN_REPORT, and after it until
  // TakeResyncRequest() is called.
  bool TakeResyncRequest();

  uint64_t drops() const { return drops_; }
  uint64_t autorepeats() const { return autorepeats_; }
  uint64_t lost_presses() const { return lost_presses_; }
  const std::set<uint16_t>& down() const { return down_; }
  // A press with the key already down, or a release with it up (seen when
  // records were lost without SYN_DROPPED, or right after a resync).
  uint64_t inconsistencies() const { return inconsistencies_; }

 private:
  void Apply(const InputRecord& r, std::vector<KeyChange>* out);

  std::string partial_;               // bytes of an incomplete record
  std::vector<InputRecord> frame_;    // EV_KEY records since the last SYN_REPORT
  bool dropping_ = false;             // between SYN_DROPPED and SYN_REPORT
  bool resync_wanted_ = false;
  std::set<uint16_t> down_;           // keys held down
  uint64_t drops_ = 0;
  uint64_t autorepeats_ = 0;
  uint64_t lost_presses_ = 0;
  uint64_t inconsistencies_ = 0;
};

// What --list-devices shows about one device.
struct DeviceInfo {
  std::string path;
  std::string name;        // EVIOCGNAME; the file name for a non-device
  uint16_t vendor = 0;     // EVIOCGID
  uint16_t product = 0;
  bool is_device = false;  // a character device (ioctls apply)
  std::vector<uint16_t> keys;  // EV_KEY codes it can send (EVIOCGBIT)
};

// Information about one path; the OS error if it cannot be opened.
absl::StatusOr<DeviceInfo> ProbeDevice(const std::string& path);
// Every event* entry of `dir` that can be opened, sorted by path; paths that
// cannot be opened (permissions) are listed with an empty name.
std::vector<DeviceInfo> ListDevices(const std::string& dir);
// One line per device: "path  vvvv:pppp  name  keys: KEY_A KEY_B ...".
std::string FormatDeviceList(const std::vector<DeviceInfo>& devices, bool all_keys);

// How --device names a device: a path (contains '/'), "VVVV:PPPP" in hex,
// or a name (exact, else a unique substring).
struct DeviceSelector {
  std::string text;
  // Path of the matching device in `devices`; NOT_FOUND or
  // FAILED_PRECONDITION (ambiguous).
  absl::StatusOr<std::string> Match(const std::vector<DeviceInfo>& devices) const;
  bool is_path() const { return text.find('/') != std::string::npos; }
};

class EvdevDevice {
 public:
  struct Options {
    DeviceSelector selector;
    std::string dir = "/dev/input";  // searched for names and ids
    bool grab = false;               // EVIOCGRAB: no other reader sees keys
  };
  // What one Poll() produced.
  struct Batch {
    std::vector<KeyChange> changes;
    bool connected = false;      // the device was (re)opened in this call
    bool disconnected = false;   // it went away in this call
    std::string note;            // why, for the status line
    int64_t read_ns = 0;         // client clock right after the read
  };

  explicit EvdevDevice(Options options) : options_(std::move(options)) {}
  ~EvdevDevice();
  EvdevDevice(const EvdevDevice&) = delete;
  EvdevDevice& operator=(const EvdevDevice&) = delete;

  // Opens the device now; the error if it cannot (the caller may still
  // Poll(), which retries).
  absl::Status Open();
  // Waits up to timeout_ms for input (or, when closed, looks for the device
  // again) and decodes what arrives. `wake_fd` (-1: none) ends the wait.
  Batch Poll(int timeout_ms, int wake_fd = -1);

  bool is_open() const { return fd_ >= 0; }
  const DeviceInfo& info() const { return info_; }
  const EvdevDecoder& decoder() const { return decoder_; }
  uint64_t reopens() const { return reopens_; }
  // Whether EVIOCSCLOCKID(CLOCK_MONOTONIC) succeeded on the open device.
  bool monotonic_clock() const { return monotonic_; }

 private:
  void Close();
  bool PathStillOurs() const;

  Options options_;
  int fd_ = -1;
  dev_t dev_ = 0;
  ino_t ino_ = 0;
  DeviceInfo info_;
  bool monotonic_ = false;
  bool ever_opened_ = false;
  // Who the device was when first opened by path, so that a re-plug under
  // another event number is found by name and id.
  std::string first_name_;
  uint16_t first_vendor_ = 0;
  uint16_t first_product_ = 0;
  uint64_t reopens_ = 0;
  EvdevDecoder decoder_;
};

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_EVDEV_H_

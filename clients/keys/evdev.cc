#include "clients/keys/evdev.h"

#include <dirent.h>
#include <fcntl.h>
#include <linux/input.h>
#include <poll.h>
#include <sys/ioctl.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <cerrno>
#include <cstddef>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <map>
#include <utility>

namespace tickmark::keys {

int64_t InputRecord::time_ns() const {
  int64_t sec_ns = 0, usec_ns = 0, sum = 0;
  const int64_t saturated = (sec < 0 || (sec == 0 && usec < 0)) ? INT64_MIN : INT64_MAX;
  if (__builtin_mul_overflow(sec, int64_t{1'000'000'000}, &sec_ns) ||
      __builtin_mul_overflow(usec, int64_t{1'000}, &usec_ns) ||
      __builtin_add_overflow(sec_ns, usec_ns, &sum)) {
    return saturated;
  }
  return sum;
}

// The layout the constants above promise; the kernel header is the authority.
static_assert(sizeof(input_event) == kInputEventSize);
static_assert(offsetof(input_event, type) == kInputEventTypeOffset);
static_assert(offsetof(input_event, code) == kInputEventCodeOffset);
static_assert(offsetof(input_event, value) == kInputEventValueOffset);

namespace {

constexpr uint16_t kEvSyn = 0;
constexpr uint16_t kEvKey = 1;
constexpr uint16_t kSynReport = 0;
constexpr uint16_t kSynDropped = 3;

struct NamedCode {
  const char* name;
  uint16_t code;
};

#define TM_KEY(x) {#x, x}
// The codes profiles are likely to name; others are given as numbers.
constexpr NamedCode kNamedCodes[] = {
    TM_KEY(KEY_ESC), TM_KEY(KEY_1), TM_KEY(KEY_2), TM_KEY(KEY_3), TM_KEY(KEY_4),
    TM_KEY(KEY_5), TM_KEY(KEY_6), TM_KEY(KEY_7), TM_KEY(KEY_8), TM_KEY(KEY_9),
    TM_KEY(KEY_0), TM_KEY(KEY_MINUS), TM_KEY(KEY_EQUAL), TM_KEY(KEY_BACKSPACE),
    TM_KEY(KEY_TAB), TM_KEY(KEY_Q), TM_KEY(KEY_W), TM_KEY(KEY_E), TM_KEY(KEY_R),
    TM_KEY(KEY_T), TM_KEY(KEY_Y), TM_KEY(KEY_U), TM_KEY(KEY_I), TM_KEY(KEY_O),
    TM_KEY(KEY_P), TM_KEY(KEY_ENTER), TM_KEY(KEY_A), TM_KEY(KEY_S), TM_KEY(KEY_D),
    TM_KEY(KEY_F), TM_KEY(KEY_G), TM_KEY(KEY_H), TM_KEY(KEY_J), TM_KEY(KEY_K),
    TM_KEY(KEY_L), TM_KEY(KEY_Z), TM_KEY(KEY_X), TM_KEY(KEY_C), TM_KEY(KEY_V),
    TM_KEY(KEY_B), TM_KEY(KEY_N), TM_KEY(KEY_M), TM_KEY(KEY_DOT), TM_KEY(KEY_SPACE),
    TM_KEY(KEY_F5), TM_KEY(KEY_KPMINUS), TM_KEY(KEY_KPPLUS), TM_KEY(KEY_KP0),
    TM_KEY(KEY_KP1), TM_KEY(KEY_KP2), TM_KEY(KEY_KP3), TM_KEY(KEY_KP4),
    TM_KEY(KEY_KP5), TM_KEY(KEY_KP6), TM_KEY(KEY_KP7), TM_KEY(KEY_KP8),
    TM_KEY(KEY_KP9), TM_KEY(KEY_KPDOT), TM_KEY(KEY_KPENTER), TM_KEY(KEY_UP),
    TM_KEY(KEY_PAGEUP), TM_KEY(KEY_LEFT), TM_KEY(KEY_RIGHT), TM_KEY(KEY_DOWN),
    TM_KEY(KEY_PAGEDOWN), TM_KEY(KEY_VOLUMEUP), TM_KEY(KEY_VOLUMEDOWN),
    TM_KEY(BTN_0), TM_KEY(BTN_1), TM_KEY(BTN_2), TM_KEY(BTN_3), TM_KEY(BTN_4),
    TM_KEY(BTN_LEFT), TM_KEY(BTN_RIGHT), TM_KEY(BTN_MIDDLE), TM_KEY(BTN_SOUTH),
    TM_KEY(BTN_EAST), TM_KEY(BTN_NORTH), TM_KEY(BTN_WEST), TM_KEY(BTN_TL),
    TM_KEY(BTN_TR), TM_KEY(BTN_SELECT), TM_KEY(BTN_START), TM_KEY(BTN_MODE),
    TM_KEY(BTN_TRIGGER), TM_KEY(BTN_THUMB),
};
#undef TM_KEY

absl::Status OsError(int err, const std::string& what) {
  return absl::Status(absl::ErrnoToStatusCode(err), what + ": " + std::strerror(err));
}

int64_t NowMonotonicNs() {
  timespec ts{};
  clock_gettime(CLOCK_MONOTONIC, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 + ts.tv_nsec;
}

bool TestBit(const std::vector<unsigned char>& bits, size_t bit) {
  return bit / 8 < bits.size() && (bits[bit / 8] >> (bit % 8) & 1) != 0;
}

std::string Hex4(uint16_t v) {
  char buf[8];
  std::snprintf(buf, sizeof buf, "%04x", v);
  return buf;
}

}  // namespace

InputRecord DecodeInputRecord(const unsigned char* bytes) {
  input_event e;
  std::memcpy(&e, bytes, sizeof e);
  InputRecord r;
  r.sec = static_cast<int64_t>(e.input_event_sec);
  r.usec = static_cast<int64_t>(e.input_event_usec);
  r.type = e.type;
  r.code = e.code;
  r.value = e.value;
  return r;
}

std::string EncodeInputRecord(const InputRecord& r) {
  input_event e{};
  e.input_event_sec = static_cast<decltype(e.input_event_sec)>(r.sec);
  e.input_event_usec = static_cast<decltype(e.input_event_usec)>(r.usec);
  e.type = r.type;
  e.code = r.code;
  e.value = r.value;
  return std::string(reinterpret_cast<const char*>(&e), sizeof e);
}

std::optional<uint16_t> KeyCodeFromName(std::string_view name) {
  for (const NamedCode& n : kNamedCodes) {
    if (name == n.name) return n.code;
  }
  if (name.empty()) return std::nullopt;
  const std::string s(name);
  char* end = nullptr;
  errno = 0;
  const unsigned long v = std::strtoul(s.c_str(), &end, 0);
  if (errno != 0 || *end != '\0' || !std::isdigit(static_cast<unsigned char>(s[0])) ||
      v > KEY_MAX) {
    return std::nullopt;
  }
  return static_cast<uint16_t>(v);
}

std::string KeyCodeName(uint16_t code) {
  for (const NamedCode& n : kNamedCodes) {
    if (n.code == code) return n.name;
  }
  char buf[16];
  std::snprintf(buf, sizeof buf, "0x%x", code);
  return buf;
}

std::vector<KeyChange> EvdevDecoder::Feed(std::string_view bytes) {
  std::vector<KeyChange> out;
  partial_.append(bytes);
  size_t at = 0;
  for (; at + kInputEventSize <= partial_.size(); at += kInputEventSize) {
    Apply(DecodeInputRecord(reinterpret_cast<const unsigned char*>(partial_.data() + at)),
          &out);
  }
  partial_.erase(0, at);
  return out;
}

void EvdevDecoder::Apply(const InputRecord& r, std::vector<KeyChange>* out) {
  if (r.type == kEvSyn && r.code == kSynDropped) {
    // The kernel's buffer overflowed: this frame and the records up to the
    // next SYN_REPORT are incomplete (event-codes.rst, SYN_DROPPED).
    ++drops_;
    dropping_ = true;
    resync_wanted_ = true;
    frame_.clear();
    return;
  }
  if (r.type == kEvSyn && r.code == kSynReport) {
    if (dropping_) {
      dropping_ = false;
      return;
    }
    for (const InputRecord& k : frame_) {
      if (k.value == 1) {
        if (!down_.insert(k.code).second) ++inconsistencies_;
        out->push_back({KeyChange::Kind::kPress, k.code, k.time_ns()});
      } else {
        if (down_.erase(k.code) == 0) ++inconsistencies_;
        out->push_back({KeyChange::Kind::kRelease, k.code, k.time_ns()});
      }
    }
    frame_.clear();
    return;
  }
  if (dropping_ || r.type != kEvKey) return;  // EV_MSC scan codes etc. unused
  if (r.value == 2) {
    ++autorepeats_;  // held key repeating: not a new judgement
    return;
  }
  if (r.value == 0 || r.value == 1) frame_.push_back(r);
}

void EvdevDecoder::Resync(const std::set<uint16_t>& down_now) {
  for (uint16_t code : down_now) {
    if (down_.count(code) == 0) ++lost_presses_;
  }
  down_ = down_now;
}

void EvdevDecoder::Reset(const std::set<uint16_t>& down_now) {
  partial_.clear();
  frame_.clear();
  dropping_ = false;
  resync_wanted_ = false;
  down_ = down_now;
}

bool EvdevDecoder::TakeResyncRequest() {
  if (!resync_wanted_ || dropping_) return false;
  resync_wanted_ = false;
  return true;
}

absl::StatusOr<DeviceInfo> ProbeDevice(const std::string& path) {
  DeviceInfo info;
  info.path = path;
  const int fd = open(path.c_str(), O_RDONLY | O_NONBLOCK | O_CLOEXEC);
  if (fd < 0) {
    return OsError(errno, "open " + path);
  }
  struct stat st {};
  fstat(fd, &st);
  info.is_device = S_ISCHR(st.st_mode);
  if (info.is_device) {
    char name[256] = {};
    if (ioctl(fd, EVIOCGNAME(sizeof name - 1), name) >= 0) info.name = name;
    input_id id{};
    if (ioctl(fd, EVIOCGID, &id) >= 0) {
      info.vendor = id.vendor;
      info.product = id.product;
    }
    std::vector<unsigned char> bits(KEY_MAX / 8 + 1);
    if (ioctl(fd, EVIOCGBIT(EV_KEY, static_cast<unsigned>(bits.size())), bits.data()) >= 0) {
      for (size_t c = 0; c <= KEY_MAX; ++c) {
        if (TestBit(bits, c)) info.keys.push_back(static_cast<uint16_t>(c));
      }
    }
  } else {
    const size_t slash = path.rfind('/');
    info.name = slash == std::string::npos ? path : path.substr(slash + 1);
  }
  close(fd);
  return info;
}

std::vector<DeviceInfo> ListDevices(const std::string& dir) {
  std::vector<DeviceInfo> out;
  DIR* d = opendir(dir.c_str());
  if (d == nullptr) return out;
  while (dirent* e = readdir(d)) {
    const std::string n = e->d_name;
    if (n.rfind("event", 0) != 0) continue;
    const std::string path = dir + "/" + n;
    auto info = ProbeDevice(path);
    if (info.ok()) {
      out.push_back(*std::move(info));
    } else {
      DeviceInfo unreadable;
      unreadable.path = path;
      out.push_back(unreadable);
    }
  }
  closedir(d);
  std::sort(out.begin(), out.end(),
            [](const DeviceInfo& a, const DeviceInfo& b) { return a.path < b.path; });
  return out;
}

std::string FormatDeviceList(const std::vector<DeviceInfo>& devices, bool all_keys) {
  std::string out;
  for (const DeviceInfo& d : devices) {
    out += d.path + "  " + Hex4(d.vendor) + ":" + Hex4(d.product) + "  ";
    out += d.name.empty() ? "(cannot open: permission? try the input group)" : "\"" + d.name + "\"";
    if (!d.keys.empty()) {
      out += "\n    keys (" + std::to_string(d.keys.size()) + "):";
      size_t shown = 0;
      for (uint16_t k : d.keys) {
        if (!all_keys && shown == 16) {
          out += " ... (--verbose lists all)";
          break;
        }
        out += " " + KeyCodeName(k);
        ++shown;
      }
    }
    out += "\n";
  }
  if (devices.empty()) out = "no input devices found\n";
  return out;
}

absl::StatusOr<std::string> DeviceSelector::Match(
    const std::vector<DeviceInfo>& devices) const {
  if (is_path()) return text;
  unsigned vendor = 0;
  unsigned product = 0;
  char tail = 0;
  if (text.size() == 9 &&
      std::sscanf(text.c_str(), "%4x:%4x%c", &vendor, &product, &tail) == 2) {
    for (const DeviceInfo& d : devices) {
      if (d.vendor == vendor && d.product == product && !d.keys.empty()) return d.path;
    }
    return absl::NotFoundError("no input device with id " + text);
  }
  std::vector<const DeviceInfo*> partial;
  for (const DeviceInfo& d : devices) {
    if (d.name == text) return d.path;
    if (!d.name.empty() && d.name.find(text) != std::string::npos) partial.push_back(&d);
  }
  if (partial.size() == 1) return partial[0]->path;
  if (partial.empty()) return absl::NotFoundError("no input device named \"" + text + "\"");
  return absl::FailedPreconditionError("\"" + text + "\" matches " +
                                       std::to_string(partial.size()) +
                                       " devices; give the path or the full name");
}

EvdevDevice::~EvdevDevice() { Close(); }

void EvdevDevice::Close() {
  if (fd_ >= 0) close(fd_);
  fd_ = -1;
}

absl::Status EvdevDevice::Open() {
  Close();
  std::string path;
  if (options_.selector.is_path()) {
    path = options_.selector.text;
    if (ever_opened_ && !first_name_.empty()) {
      // Re-plugged devices may get another event number: prefer the one
      // with the same name and id.
      auto here = ProbeDevice(path);
      if (!here.ok() || here->name != first_name_ || here->vendor != first_vendor_ ||
          here->product != first_product_) {
        for (const DeviceInfo& d : ListDevices(options_.dir)) {
          if (d.name == first_name_ && d.vendor == first_vendor_ && d.product == first_product_) {
            path = d.path;
            break;
          }
        }
      }
    }
  } else {
    auto matched = options_.selector.Match(ListDevices(options_.dir));
    if (!matched.ok()) return matched.status();
    path = *matched;
  }
  auto info = ProbeDevice(path);
  if (!info.ok()) return info.status();
  const int fd = open(path.c_str(), O_RDONLY | O_NONBLOCK | O_CLOEXEC);
  if (fd < 0) return OsError(errno, "open " + path);
  struct stat st {};
  fstat(fd, &st);
  monotonic_ = false;
  if (info->is_device) {
    // Kernel timestamps on CLOCK_MONOTONIC, the clock probes are answered
    // with; the default, CLOCK_REALTIME, can step.
    int clock_id = CLOCK_MONOTONIC;
    monotonic_ = ioctl(fd, EVIOCSCLOCKID, &clock_id) == 0;
    // Changing the clock flushes the client's queue and queues a SYN_DROPPED
    // (drivers/input/evdev.c); left there, it would discard the first real
    // frame. Nothing in the queue predates this open by more than the two
    // calls above, so drain it and take the key state from EVIOCGKEY below.
    unsigned char drain[kInputEventSize * 64];
    while (read(fd, drain, sizeof drain) > 0) {
    }
    if (options_.grab && ioctl(fd, EVIOCGRAB, 1) != 0) {
      const int err = errno;
      close(fd);
      return OsError(err, "EVIOCGRAB " + path + " (another program holds it?)");
    }
  }
  fd_ = fd;
  dev_ = st.st_dev;
  ino_ = st.st_ino;
  info_ = *std::move(info);
  if (ever_opened_) ++reopens_;
  if (!ever_opened_ && info_.is_device) {
    first_name_ = info_.name;
    first_vendor_ = info_.vendor;
    first_product_ = info_.product;
  }
  ever_opened_ = true;
  // Whatever was held before a reopen is unknown now; start from the device.
  std::set<uint16_t> down;
  if (info_.is_device) {
    std::vector<unsigned char> bits(KEY_MAX / 8 + 1);
    if (ioctl(fd_, EVIOCGKEY(static_cast<unsigned>(bits.size())), bits.data()) >= 0) {
      for (size_t c = 0; c <= KEY_MAX; ++c) {
        if (TestBit(bits, c)) down.insert(static_cast<uint16_t>(c));
      }
    }
  }
  decoder_.Reset(down);
  return absl::OkStatus();
}

bool EvdevDevice::PathStillOurs() const {
  struct stat st {};
  if (stat(info_.path.c_str(), &st) != 0) return false;
  return st.st_dev == dev_ && st.st_ino == ino_;
}

EvdevDevice::Batch EvdevDevice::Poll(int timeout_ms, int wake_fd) {
  Batch b;
  if (fd_ < 0) {
    // Unplugged (or never found): look again. Polling the folder is enough
    // for a human re-plugging a cable; inotify would only save a few ms.
    if (Open().ok()) {
      b.connected = true;
      b.note = "opened " + info_.path;
      return b;
    }
    pollfd p{wake_fd, POLLIN, 0};
    (void)poll(&p, wake_fd >= 0 ? 1 : 0, std::min(timeout_ms, 250));
    return b;
  }
  pollfd fds[2] = {{fd_, POLLIN, 0}, {wake_fd, POLLIN, 0}};
  const int ready = poll(fds, wake_fd >= 0 ? 2 : 1, timeout_ms);
  if (ready <= 0) {
    if (!info_.is_device && !PathStillOurs()) {
      Close();
      b.disconnected = true;
      b.note = info_.path + " went away";
    }
    return b;
  }
  if ((fds[0].revents & (POLLIN | POLLHUP | POLLERR)) == 0) return b;
  unsigned char buf[kInputEventSize * 64];
  const ssize_t n = read(fd_, buf, sizeof buf);
  b.read_ns = NowMonotonicNs();
  if (n > 0) {
    b.changes = decoder_.Feed(
        std::string_view(reinterpret_cast<const char*>(buf), static_cast<size_t>(n)));
    if (decoder_.TakeResyncRequest() && info_.is_device) {
      std::vector<unsigned char> bits(KEY_MAX / 8 + 1);
      std::set<uint16_t> down;
      if (ioctl(fd_, EVIOCGKEY(static_cast<unsigned>(bits.size())), bits.data()) >= 0) {
        for (size_t c = 0; c <= KEY_MAX; ++c) {
          if (TestBit(bits, c)) down.insert(static_cast<uint16_t>(c));
        }
        decoder_.Resync(down);
      }
    }
    return b;
  }
  if (n < 0 && (errno == EAGAIN || errno == EINTR)) return b;
  if (n == 0 && !info_.is_device) {
    // End of a file of records: more may be appended, unless the path now
    // names another file (the test's "unplug").
    if (!PathStillOurs()) {
      Close();
      b.disconnected = true;
      b.note = info_.path + " went away";
    } else {
      pollfd p{wake_fd, POLLIN, 0};
      (void)poll(&p, wake_fd >= 0 ? 1 : 0, std::min(timeout_ms, 20));
    }
    return b;
  }
  // ENODEV: the device was unplugged.
  b.note = info_.path + ": " + (n < 0 ? std::strerror(errno) : "end of input");
  Close();
  b.disconnected = true;
  return b;
}

}  // namespace tickmark::keys

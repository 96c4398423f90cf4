#include "clients/serial/serial_source.h"

#include <poll.h>
#include <time.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <cstdio>
#include <cstring>
#include <fstream>
#include <set>
#include <sstream>

#include <boost/asio/io_context.hpp>
#include <boost/asio/serial_port.hpp>
#include <toml++/toml.h>

namespace tickmark::serial {
namespace {

namespace asio = boost::asio;

int64_t NowNs() {
  timespec ts{};
  clock_gettime(CLOCK_MONOTONIC, &ts);
  return static_cast<int64_t>(ts.tv_sec) * 1'000'000'000 + ts.tv_nsec;
}

absl::Status At(std::string_view source, const toml::node& n, const std::string& what) {
  std::ostringstream os;
  os << source << ":" << n.source().begin.line << ":" << n.source().begin.column << ": "
     << what;
  return absl::InvalidArgumentError(os.str());
}

}  // namespace

keys::ButtonMap::Namer SerialNamer(PortSettings::Protocol protocol) {
  keys::ButtonMap::Namer n;
  if (protocol == PortSettings::Protocol::kRaw) {
    n.canonical = [](std::string_view s) -> std::optional<std::string> {
      if (s.size() == 1 && s[0] > ' ' && s[0] < '\x7f') {
        return RawButtonName(static_cast<unsigned char>(s[0]));
      }
      unsigned v = 0;
      char tail = 0;
      if (s.size() == 4 && s.substr(0, 2) == "0x" &&
          std::sscanf(std::string(s).c_str(), "0x%2x%c", &v, &tail) == 1) {
        return RawButtonName(static_cast<unsigned char>(v));
      }
      return std::nullopt;
    };
    n.hint = "raw protocol buttons are bytes: \"0x31\" or one printable character";
  } else {
    n.canonical = [](std::string_view s) -> std::optional<std::string> {
      if (!ParseBoxLine(std::string(s) + " down")) return std::nullopt;
      return std::string(s);
    };
    n.hint = "line protocol buttons are 1-16 letters, digits or _ (B1)";
  }
  return n;
}

absl::StatusOr<SerialProfile> ParseSerialProfile(std::string_view text,
                                                 std::string_view source_name) {
  toml::table root;
  try {
    root = toml::parse(text, source_name);
  } catch (const toml::parse_error& e) {
    std::ostringstream os;
    os << source_name << ":" << e.source().begin.line << ":" << e.source().begin.column
       << ": " << e.description();
    return absl::InvalidArgumentError(os.str());
  }
  SerialProfile p;
  if (const toml::node* s = root.get("serial"); s != nullptr) {
    if (!s->is_table()) return At(source_name, *s, "serial must be a table");
    for (const auto& [k, node] : *s->as_table()) {
      const std::string key(k.str());
      if (key == "protocol") {
        const std::optional<std::string> v = node.value<std::string>();
        if (!v || (*v != "line" && *v != "raw")) {
          return At(source_name, node, "protocol must be \"line\" or \"raw\"");
        }
        p.settings.protocol =
            *v == "raw" ? PortSettings::Protocol::kRaw : PortSettings::Protocol::kLine;
      } else if (key == "baud") {
        const std::optional<int64_t> v = node.value<int64_t>();
        if (!v || *v < 50 || *v > 4'000'000) return At(source_name, node, "baud must be 50..4000000");
        p.settings.baud = static_cast<unsigned>(*v);
      } else if (key == "parity") {
        const std::optional<std::string> v = node.value<std::string>();
        if (!v || (*v != "none" && *v != "even" && *v != "odd")) {
          return At(source_name, node, "parity must be none, even or odd");
        }
        p.settings.parity = *v;
      } else if (key == "stop_bits") {
        const std::optional<double> v = node.value<double>();
        if (!v || (*v != 1.0 && *v != 1.5 && *v != 2.0)) {
          return At(source_name, node, "stop_bits must be 1, 1.5 or 2");
        }
        p.settings.stop_bits = *v == 1.0 ? "1" : *v == 1.5 ? "1.5" : "2";
      } else if (key == "data_bits") {
        const std::optional<int64_t> v = node.value<int64_t>();
        if (!v || *v < 5 || *v > 8) return At(source_name, node, "data_bits must be 5..8");
        p.settings.data_bits = static_cast<unsigned>(*v);
      } else if (key == "box_clock") {
        const std::optional<bool> v = node.value<bool>();
        if (!v) return At(source_name, node, "box_clock must be true or false");
        p.settings.box_clock = *v;
      } else {
        return At(source_name, node,
                  "unknown field \"" + key +
                      "\" in [serial] (protocol, baud, parity, stop_bits, data_bits, box_clock)");
      }
    }
  }
  auto buttons = keys::ButtonMap::FromToml(text, source_name, SerialNamer(p.settings.protocol),
                                           {"serial"});
  if (!buttons.ok()) return buttons.status();
  p.buttons = *std::move(buttons);
  return p;
}

absl::StatusOr<SerialProfile> LoadSerialProfile(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return absl::NotFoundError("cannot read profile " + path);
  std::stringstream ss;
  ss << in.rdbuf();
  return ParseSerialProfile(ss.str(), path);
}

struct SerialSource::Port {
  asio::io_context io;
  asio::serial_port port{io};
};

SerialSource::SerialSource(std::string path, PortSettings settings)
    : path_(std::move(path)), settings_(std::move(settings)) {}

SerialSource::~SerialSource() { Close(); }

bool SerialSource::is_open() const { return port_ != nullptr && port_->port.is_open(); }

void SerialSource::Close() {
  if (port_ != nullptr) {
    boost::system::error_code ignored;
    port_->port.close(ignored);
  }
  port_.reset();
}

absl::Status SerialSource::Open() {
  Close();
  auto p = std::make_unique<Port>();
  boost::system::error_code ec;
  p->port.open(path_, ec);
  if (ec) return absl::UnavailableError("open " + path_ + ": " + ec.message());
  using sp = asio::serial_port_base;
  const sp::parity::type parity = settings_.parity == "even"  ? sp::parity::even
                                  : settings_.parity == "odd" ? sp::parity::odd
                                                              : sp::parity::none;
  const sp::stop_bits::type stop = settings_.stop_bits == "2"     ? sp::stop_bits::two
                                   : settings_.stop_bits == "1.5" ? sp::stop_bits::onepointfive
                                                                  : sp::stop_bits::one;
  p->port.set_option(sp::baud_rate(settings_.baud), ec);
  if (!ec) p->port.set_option(sp::parity(parity), ec);
  if (!ec) p->port.set_option(sp::stop_bits(stop), ec);
  if (!ec) p->port.set_option(sp::character_size(settings_.data_bits), ec);
  if (!ec) p->port.set_option(sp::flow_control(sp::flow_control::none), ec);
  if (ec) return absl::InvalidArgumentError("configure " + path_ + ": " + ec.message());
  port_ = std::move(p);
  return absl::OkStatus();
}

SerialSource::Batch SerialSource::Poll(int timeout_ms, int wake_fd) {
  Batch b;
  if (!is_open()) {
    if (Open().ok()) {
      b.connected = true;
      b.notes.push_back("port open: " + path_);
    } else {
      pollfd p{wake_fd, POLLIN, 0};
      (void)poll(&p, wake_fd >= 0 ? 1 : 0, std::min(timeout_ms, 250));
    }
    return b;
  }
  const int fd = port_->port.native_handle();
  pollfd fds[2] = {{fd, POLLIN, 0}, {wake_fd, POLLIN, 0}};
  const int ready = poll(fds, wake_fd >= 0 ? 2 : 1, timeout_ms);
  if (ready <= 0 || (fds[0].revents & (POLLIN | POLLHUP | POLLERR)) == 0) return b;
  char buf[512];
  const ssize_t n = read(fd, buf, sizeof buf);
  const int64_t now = NowNs();  // the receive time of every byte of this read
  if (n <= 0) {
    if (n < 0 && (errno == EAGAIN || errno == EINTR)) return b;
    b.notes.push_back(path_ + ": " + (n < 0 ? std::strerror(errno) : "hung up") +
                      "; waiting for the port to return");
    Close();
    b.disconnected = true;
    return b;
  }
  last_byte_ns_ = now;
  const std::string_view bytes(buf, static_cast<size_t>(n));
  const std::vector<BoxEvent> events = settings_.protocol == PortSettings::Protocol::kRaw
                                           ? raw_.Feed(bytes, now)
                                           : line_.Feed(bytes, now);
  const bool use_box = settings_.box_clock;
  for (const BoxEvent& e : events) {
    if (e.box_us && use_box) clock_.Add(*e.box_us, e.host_ns);
  }
  for (const BoxEvent& e : events) {
    TimedPress t;
    t.event = e;
    t.event_ns = e.host_ns;
    if (e.box_us && use_box) {
      t.event_ns = clock_.Map(*e.box_us);
      t.from_box_clock = true;
      ++stats_.from_box;
      const int64_t excess = e.host_ns - t.event_ns;
      stats_.max_excess_ns = std::max(stats_.max_excess_ns, excess);
      stats_.sum_excess_ns += static_cast<double>(excess);
    }
    ++stats_.presses;
    b.presses.push_back(std::move(t));
  }
  if (line_.garbage_lines() != garbage_seen_) {
    b.notes.push_back("garbage from the box (" + std::to_string(line_.garbage_lines()) +
                      " lines so far): \"" + line_.last_garbage() + "\"");
    garbage_seen_ = line_.garbage_lines();
  }
  if (line_.stale_fragments() != stale_seen_) {
    b.notes.push_back("dropped a line cut off by silence");
    stale_seen_ = line_.stale_fragments();
  }
  if (clock_.resets() != resets_seen_) {
    b.notes.push_back("box clock went back (box restarted?); clock model restarted");
    resets_seen_ = clock_.resets();
  }
  return b;
}

std::string SerialSource::Report() const {
  char buf[256];
  std::string out = "timing report (serial " + path_ + ", " +
                    (settings_.protocol == PortSettings::Protocol::kRaw ? "raw" : "line") +
                    " protocol):\n";
  std::snprintf(buf, sizeof buf, "  events %llu, timed by the box's clock %llu\n",
                static_cast<unsigned long long>(stats_.presses),
                static_cast<unsigned long long>(stats_.from_box));
  out += buf;
  if (stats_.from_box > 0) {
    std::snprintf(buf, sizeof buf,
                  "  read time - event time (removed by the box clock; bursts read at once\n"
                  "  keep the box's spacing): mean %.3f ms, max %.3f ms\n",
                  stats_.sum_excess_ns / static_cast<double>(stats_.from_box) / 1e6,
                  static_cast<double>(stats_.max_excess_ns) / 1e6);
    out += buf;
    out += "  (box time mapped to CLOCK_MONOTONIC by a min filter of receive - box time:\n"
           "  the varying delay above is removed; the minimum transit, at least the\n"
           "  line's transmission time, stays in as a constant late bias)\n";
  }
  std::snprintf(buf, sizeof buf,
                "  without box timestamps the event time is the read time: the press is\n"
                "  earlier by the transmission (10 bits/char at %u baud = %.3f ms per\n"
                "  char), USB-serial latency (often 1-16 ms) and scheduling, not corrected\n",
                settings_.baud, 10.0 / settings_.baud * 1e3);
  out += buf;
  out += "  garbage lines " + std::to_string(line_.garbage_lines()) + ", cut-off lines " +
         std::to_string(line_.stale_fragments()) + ", box clock restarts " +
         std::to_string(clock_.resets()) + "\n";
  return out;
}

}  // namespace tickmark::serial

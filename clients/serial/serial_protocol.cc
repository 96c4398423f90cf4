#include "clients/serial/serial_protocol.h"

#include <algorithm>
#include <cctype>
#include <charconv>
#include <cstdio>

namespace tickmark::serial {
namespace {

std::vector<std::string_view> Words(std::string_view s) {
  std::vector<std::string_view> out;
  size_t i = 0;
  while (i < s.size()) {
    while (i < s.size() && (s[i] == ' ' || s[i] == '\t')) ++i;
    const size_t start = i;
    while (i < s.size() && s[i] != ' ' && s[i] != '\t') ++i;
    if (i > start) out.push_back(s.substr(start, i - start));
  }
  return out;
}

bool IsButtonName(std::string_view w) {
  if (w.empty() || w.size() > 16) return false;
  return std::all_of(w.begin(), w.end(), [](char c) {
    return std::isalnum(static_cast<unsigned char>(c)) != 0 || c == '_';
  });
}

}  // namespace

std::optional<BoxEvent> ParseBoxLine(std::string_view line) {
  const std::vector<std::string_view> w = Words(line);
  if (w.size() < 2 || w.size() > 3 || !IsButtonName(w[0])) return std::nullopt;
  BoxEvent e;
  e.button = std::string(w[0]);
  if (w[1] == "down") {
    e.pressed = true;
  } else if (w[1] == "up") {
    e.pressed = false;
  } else {
    return std::nullopt;
  }
  if (w.size() == 3) {
    int64_t us = 0;
    const auto [end, ec] = std::from_chars(w[2].data(), w[2].data() + w[2].size(), us);
    if (ec != std::errc() || end != w[2].data() + w[2].size() || us < 0 || us > kMaxBoxMicros) {
      return std::nullopt;
    }
    e.box_us = us;
  }
  return e;
}

std::vector<BoxEvent> LineProtocol::Feed(std::string_view bytes, int64_t host_ns) {
  std::vector<BoxEvent> out;
  if (!bytes.empty() && (!line_.empty() || overlong_) && host_ns - last_bytes_ns_ > stale_ns_) {
    // The box went quiet mid-line: whatever comes now starts afresh.
    ++stale_;
    line_.clear();
    overlong_ = false;
  }
  if (!bytes.empty()) last_bytes_ns_ = host_ns;
  for (char c : bytes) {
    if (c == '\n') {
      EndLine(host_ns, &out);
      continue;
    }
    if (c == '\r') continue;
    if (line_.size() >= kMaxLine) {
      overlong_ = true;
      continue;
    }
    line_.push_back(c);
  }
  return out;
}

void LineProtocol::EndLine(int64_t host_ns, std::vector<BoxEvent>* out) {
  const bool printable = std::all_of(line_.begin(), line_.end(), [](char c) {
    return c == '\t' || (c >= ' ' && c < '\x7f');
  });
  std::optional<BoxEvent> e;
  if (!overlong_ && printable) e = ParseBoxLine(line_);
  if (e) {
    e->host_ns = host_ns;
    out->push_back(*std::move(e));
  } else if (!line_.empty() || overlong_) {
    ++garbage_;
    last_garbage_.clear();
    for (char c : line_.substr(0, 40)) {
      if (c >= ' ' && c < '\x7f') {
        last_garbage_.push_back(c);
      } else {
        char buf[8];
        std::snprintf(buf, sizeof buf, "\\x%02x", static_cast<unsigned char>(c));
        last_garbage_ += buf;
      }
    }
  }
  line_.clear();
  overlong_ = false;
}

std::string RawButtonName(unsigned char byte) {
  char buf[8];
  std::snprintf(buf, sizeof buf, "0x%02x", byte);
  return buf;
}

std::vector<BoxEvent> RawProtocol::Feed(std::string_view bytes, int64_t host_ns) {
  std::vector<BoxEvent> out;
  for (char c : bytes) {
    BoxEvent e;
    e.button = RawButtonName(static_cast<unsigned char>(c));
    e.host_ns = host_ns;
    out.push_back(std::move(e));
  }
  return out;
}

void BoxClock::Add(int64_t box_us, int64_t host_ns) {
  const int64_t box_ns = box_us * 1000;
  if (!samples_.empty() && box_ns < samples_.back().box_ns) {
    // The box's clock went back: it restarted (or its counter wrapped).
    samples_.clear();
    ++resets_;
  }
  samples_.push_back({box_ns, host_ns - box_ns});
  while (samples_.size() > max_samples_ || box_ns - samples_.front().box_ns > window_ns_) {
    samples_.pop_front();
  }
  min_offset_ns_ = samples_.front().offset_ns;
  for (const Sample& s : samples_) min_offset_ns_ = std::min(min_offset_ns_, s.offset_ns);
}

int64_t BoxClock::Map(int64_t box_us) const { return box_us * 1000 + min_offset_ns_; }

int64_t BoxClock::ToHost(int64_t box_us, int64_t host_ns) {
  Add(box_us, host_ns);
  return Map(box_us);
}

}  // namespace tickmark::serial

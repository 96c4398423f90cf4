#include "clients/keys/device_pump.h"

#include <algorithm>
#include <cstdio>

namespace tickmark::keys {

void DelayStats::Add(int64_t d) {
  min_ns = count == 0 ? d : std::min(min_ns, d);
  max_ns = count == 0 ? d : std::max(max_ns, d);
  sum_ns += static_cast<double>(d);
  ++count;
}

std::string DelayStats::Format() const {
  if (count == 0) return "none";
  char buf[128];
  std::snprintf(buf, sizeof buf, "n=%llu mean %.3f ms min %.3f ms max %.3f ms",
                static_cast<unsigned long long>(count), sum_ns / static_cast<double>(count) / 1e6,
                static_cast<double>(min_ns) / 1e6, static_cast<double>(max_ns) / 1e6);
  return buf;
}

DevicePump::StepResult DevicePump::Step(int timeout_ms, int wake_fd) {
  StepResult r;
  EvdevDevice::Batch b = device_->Poll(timeout_ms, wake_fd);
  if (b.connected) r.notes.push_back("device connected: " + b.note);
  if (b.disconnected) r.notes.push_back("device gone (" + b.note + "); waiting for it to return");
  const EvdevDecoder& dec = device_->decoder();
  if (dec.drops() != seen_drops_ || dec.lost_presses() != seen_lost_) {
    r.notes.push_back("kernel buffer overflow (SYN_DROPPED) x" + std::to_string(dec.drops()) +
                      "; presses lost untimed: " + std::to_string(dec.lost_presses()));
    seen_drops_ = dec.drops();
    seen_lost_ = dec.lost_presses();
  }
  for (const KeyChange& c : b.changes) {
    if (c.kind != KeyChange::Kind::kPress) continue;  // judgement = the press
    const std::string name = KeyCodeName(c.code);
    const Binding* binding = map_->Find(name);
    if (binding == nullptr) {
      r.notes.push_back("key " + name + " is not bound");
      continue;
    }
    if (binding->action == Binding::Action::kQuit) {
      r.quit = true;
      continue;
    }
    if (b.read_ns != 0) read_delay_.Add(b.read_ns - c.time_ns);
    tickmark::v1::FeedbackMessage f;
    f.set_value(binding->value);
    f.set_event_source_ns(c.time_ns);  // the kernel's stamp, not the read
    f.set_input("evdev:" + name);
    if (absl::Status s = client_->Send(std::move(f)); !s.ok()) {
      r.notes.push_back("not sent: " + s.ToString());
      continue;
    }
    ++sent_;
    last_sent_ = binding->label + " (" + name + ")";
  }
  return r;
}

std::string DevicePump::Report() const {
  std::string out = "timing report (input device " + device_->info().path + "):\n";
  out += "  event time = kernel timestamp of the press";
  out += device_->monotonic_clock() ? " on CLOCK_MONOTONIC (EVIOCSCLOCKID)\n"
                                    : " (not a device: timestamps from the records)\n";
  out += "  read time - event time: " + read_delay_.Format() + "\n";
  out += "  that gap is what stamping at read() would have added: time in the kernel\n"
         "  queue, scheduling and this program's loop; USB polling before the kernel\n"
         "  stamp (typically up to 1-8 ms) is not seen by either and is not measured.\n";
  out += "  SYN_DROPPED: " + std::to_string(device_->decoder().drops()) +
         ", presses lost untimed: " + std::to_string(device_->decoder().lost_presses()) +
         ", autorepeats ignored: " + std::to_string(device_->decoder().autorepeats()) +
         ", reopens: " + std::to_string(device_->reopens()) + "\n";
  return out;
}

}  // namespace tickmark::keys

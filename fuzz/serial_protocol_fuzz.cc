// Fuzzes what a serial response box sends (clients/serial/serial_protocol.h):
// the line protocol and the raw protocol fed arbitrary bytes in reads of
// arbitrary sizes at arbitrary (non-decreasing) host times, and the box
// clock fed every timestamp the line protocol decodes, as SerialSource does.
#include <cstddef>
#include <cstdint>
#include <string>

#include <fuzzer/FuzzedDataProvider.h>

#include "clients/serial/serial_protocol.h"

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  FuzzedDataProvider in(data, size);
  using tickmark::serial::BoxEvent;
  tickmark::serial::LineProtocol line(in.ConsumeIntegralInRange<int64_t>(1, 10'000'000'000));
  tickmark::serial::RawProtocol raw;
  tickmark::serial::BoxClock clock;
  // Host CLOCK_MONOTONIC readings: anywhere in a long uptime, never back.
  int64_t host_ns = in.ConsumeIntegralInRange<int64_t>(0, int64_t{1} << 62);
  while (in.remaining_bytes() > 0) {
    host_ns += in.ConsumeIntegralInRange<int64_t>(0, 5'000'000'000);
    const bool use_raw = in.ConsumeBool();
    const std::string bytes =
        in.ConsumeBytesAsString(in.ConsumeIntegralInRange<size_t>(0, 300));
    if (use_raw) {
      for (const BoxEvent& e : raw.Feed(bytes, host_ns)) {
        if (e.box_us.has_value() || e.host_ns != host_ns) __builtin_trap();
      }
      continue;
    }
    const auto events = line.Feed(bytes, host_ns);
    for (const BoxEvent& e : events) {
      if (e.button.empty() || e.button.size() > 16) __builtin_trap();
      if (e.box_us) clock.Add(*e.box_us, e.host_ns);
    }
    for (const BoxEvent& e : events) {
      if (e.box_us) (void)clock.Map(*e.box_us);
    }
  }
  // One whole line on its own, as the parser sees it.
  (void)tickmark::serial::ParseBoxLine(std::string(reinterpret_cast<const char*>(data), size));
  return 0;
}

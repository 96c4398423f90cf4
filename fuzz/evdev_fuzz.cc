// Fuzzes the evdev byte decoder (clients/keys/evdev.h) the way a device or a
// FIFO of records feeds it: arbitrary bytes in reads of arbitrary sizes,
// with resyncs and resets between them. Checks what the decoder promises:
// after a read, a key whose last change in it was a press is down, one whose
// last change was a release is up; key names round-trip for every code the
// kernel defines (0..KEY_MAX); a code above it gets a "0x..." name that
// KeyCodeFromName refuses, as a profile may not name it.
#include <cstddef>
#include <cstdint>
#include <map>
#include <set>
#include <string>

#include <fuzzer/FuzzedDataProvider.h>
#include <linux/input-event-codes.h>

#include "clients/keys/evdev.h"

namespace {

std::set<uint16_t> SomeKeys(FuzzedDataProvider& in) {
  std::set<uint16_t> keys;
  const int n = in.ConsumeIntegralInRange(0, 4);
  for (int i = 0; i < n; ++i) keys.insert(in.ConsumeIntegral<uint16_t>());
  return keys;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  FuzzedDataProvider in(data, size);
  tickmark::keys::EvdevDecoder decoder;
  while (in.remaining_bytes() > 0) {
    switch (in.ConsumeIntegralInRange(0, 15)) {
      case 0:
        decoder.Resync(SomeKeys(in));
        break;
      case 1:
        decoder.Reset(SomeKeys(in));
        break;
      case 2:
        (void)decoder.TakeResyncRequest();
        break;
      default: {
        // One read() of up to three records, split anywhere.
        const std::string bytes = in.ConsumeBytesAsString(
            in.ConsumeIntegralInRange<size_t>(0, 3 * tickmark::keys::kInputEventSize));
        std::map<uint16_t, tickmark::keys::KeyChange::Kind> last;
        for (const tickmark::keys::KeyChange& c : decoder.Feed(bytes)) last[c.code] = c.kind;
        for (const auto& [code, kind] : last) {
          const bool down = decoder.down().count(code) != 0;
          if (down != (kind == tickmark::keys::KeyChange::Kind::kPress)) __builtin_trap();
        }
        break;
      }
    }
  }
  // Names round-trip for every code the kernel defines; evdev.h promises
  // nothing more (KeyCodeFromName stops at KEY_MAX, linux/input-event-codes.h).
  const uint16_t code = static_cast<uint16_t>(size);
  const std::string name = tickmark::keys::KeyCodeName(code);
  const auto back = tickmark::keys::KeyCodeFromName(name);
  if (code <= KEY_MAX) {
    if (!back || *back != code) __builtin_trap();
  } else if (back || name.rfind("0x", 0) != 0) {
    __builtin_trap();
  }
  return 0;
}

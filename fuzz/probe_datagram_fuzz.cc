// Fuzzes the UDP probe datagram codec (server/net/probe_datagram.h), which
// reads whatever arrives on the server's probe port. Two halves per input:
// the bytes as a received datagram (decoded with a fixed key, and with the
// bytes' own MAC checked against the wrong key), and the bytes as the
// fields of a datagram that is encoded, signed and decoded again. Checks:
// decoding never accepts what it cannot re-encode byte for byte, a signed
// datagram round-trips, a flipped byte or another key never verifies.
#include <cstddef>
#include <cstdint>
#include <string>
#include <string_view>

#include <fuzzer/FuzzedDataProvider.h>

#include "server/net/probe_datagram.h"

namespace {

using tickmark::net::ProbeDatagram;
using tickmark::net::ProbeDatagramKind;
using tickmark::net::ProbeDecodeResult;

const std::string kKey(tickmark::net::kProbeKeyBytes, '\x5a');
const std::string kOtherKey(tickmark::net::kProbeKeyBytes, '\xa5');

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  const std::string_view bytes(reinterpret_cast<const char*>(data), size);
  ProbeDatagram d;
  const ProbeDecodeResult r = tickmark::net::DecodeProbeDatagram(bytes, kKey, &d);
  const auto tag = tickmark::net::PeekProbeTag(bytes);
  if (r == ProbeDecodeResult::kOk && (!tag || *tag != d.tag)) __builtin_trap();
  if (r == ProbeDecodeResult::kOk && tickmark::net::EncodeProbeDatagram(d, kKey) != bytes) {
    __builtin_trap();
  }
  if (r == ProbeDecodeResult::kBadMac && !tag) __builtin_trap();

  FuzzedDataProvider in(data, size);
  ProbeDatagram f;
  f.kind = static_cast<ProbeDatagramKind>(in.ConsumeIntegralInRange<uint8_t>(1, 3));
  f.tag = in.ConsumeIntegral<uint64_t>();
  f.id = in.ConsumeIntegral<uint64_t>();
  if (f.kind != ProbeDatagramKind::kRequest) f.t1_session_ns = in.ConsumeIntegral<int64_t>();
  if (f.kind == ProbeDatagramKind::kAnswer) {
    f.t2_client_ns = in.ConsumeIntegral<int64_t>();
    f.t3_client_ns = in.ConsumeIntegral<int64_t>();
  }
  const std::string wire = tickmark::net::EncodeProbeDatagram(f, kKey);
  if (wire.size() > tickmark::net::kMaxProbeDatagramBytes) __builtin_trap();
  ProbeDatagram back;
  if (tickmark::net::DecodeProbeDatagram(wire, kKey, &back) != ProbeDecodeResult::kOk ||
      !(back == f)) {
    __builtin_trap();
  }
  if (tickmark::net::DecodeProbeDatagram(wire, kOtherKey, &back) != ProbeDecodeResult::kBadMac) {
    __builtin_trap();
  }
  std::string flipped = wire;
  const size_t at = in.ConsumeIntegralInRange<size_t>(0, flipped.size() - 1);
  flipped[at] = static_cast<char>(flipped[at] ^ (1 + in.ConsumeIntegralInRange<int>(0, 254)));
  if (tickmark::net::DecodeProbeDatagram(flipped, kKey, &back) == ProbeDecodeResult::kOk) {
    __builtin_trap();
  }
  return 0;
}

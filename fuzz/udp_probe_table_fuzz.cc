// Fuzzes the server's UDP probe table (server/net/udp_probe_table.h) with
// what an attacker on the network can send: arbitrary datagrams, and — since
// a client knows its own stream's key — correctly signed requests and
// answers with any ids and timestamps, replays included, while streams come
// and go. Checks the table's bookkeeping: every datagram is counted exactly
// once, a sample is passed on only for a challenge the table issued, with
// that challenge's T1, and at most once.
#include <cstddef>
#include <cstdint>
#include <map>
#include <set>
#include <string>
#include <utility>

#include <fuzzer/FuzzedDataProvider.h>

#include "server/net/probe_datagram.h"
#include "server/net/udp_probe_table.h"

namespace {

using tickmark::net::ProbeDatagram;
using tickmark::net::ProbeDatagramKind;

std::string KeyFor(uint64_t tag) {
  return std::string(tickmark::net::kProbeKeyBytes, static_cast<char>('A' + tag % 8));
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  FuzzedDataProvider in(data, size);
  tickmark::net::UdpProbeTable table;
  // Session time as the server's clock gives it: never near int64's ends
  // (T1 and T4 are the server's own; the clock model fuzzer covers hostile
  // ones).
  int64_t now_ns = in.ConsumeIntegralInRange<int64_t>(0, int64_t{1} << 62);
  std::map<std::pair<uint64_t, uint64_t>, int64_t> issued;  // (tag, id) -> T1
  std::set<std::pair<uint64_t, uint64_t>> sampled;
  uint64_t samples = 0;
  uint64_t sent = 0;
  auto add = [&](uint64_t tag) {
    tickmark::net::UdpProbeStream s;
    s.key = KeyFor(tag);
    s.now = [&now_ns] { return tickmark::SessionTime::FromNanos(now_ns); };
    s.on_sample = [&, tag](uint64_t id, const tickmark::ProbeTimestamps& p) {
      auto it = issued.find({tag, id});
      if (it == issued.end() || it->second != p.t1.nanos()) __builtin_trap();
      if (!sampled.insert({tag, id}).second) __builtin_trap();
      ++samples;
    };
    table.Add(tag, std::move(s));
  };
  add(1);
  add(2);
  while (in.remaining_bytes() > 0) {
    const uint64_t tag = in.ConsumeIntegralInRange<uint64_t>(0, 3);
    std::string datagram;
    switch (in.ConsumeIntegralInRange(0, 7)) {
      case 0:  // whatever arrives
        datagram = in.ConsumeBytesAsString(in.ConsumeIntegralInRange<size_t>(0, 100));
        break;
      case 1:
        add(tag);
        // A replaced stream starts without challenges.
        for (auto it = issued.begin(); it != issued.end();) {
          it = it->first.first == tag ? issued.erase(it) : std::next(it);
        }
        continue;
      case 2:
        table.Remove(tag);
        continue;
      case 3:
        now_ns += in.ConsumeIntegral<int32_t>();  // the session clock, even backwards
        continue;
      case 4:
      case 5: {  // a signed request
        ProbeDatagram r{ProbeDatagramKind::kRequest, tag, in.ConsumeIntegralInRange<uint64_t>(0, 40)};
        datagram = tickmark::net::EncodeProbeDatagram(r, KeyFor(tag));
        break;
      }
      default: {  // a signed answer (or a challenge, sent the wrong way)
        ProbeDatagram a;
        a.kind = in.ConsumeBool() ? ProbeDatagramKind::kAnswer : ProbeDatagramKind::kChallenge;
        a.tag = tag;
        a.id = in.ConsumeIntegralInRange<uint64_t>(0, 40);
        auto it = issued.find({tag, a.id});
        a.t1_session_ns = it != issued.end() && in.ConsumeBool() ? it->second
                                                                 : in.ConsumeIntegral<int64_t>();
        a.t2_client_ns = in.ConsumeIntegral<int64_t>();
        a.t3_client_ns = in.ConsumeIntegral<int64_t>();
        datagram = tickmark::net::EncodeProbeDatagram(a, KeyFor(tag));
        break;
      }
    }
    ++sent;
    const std::string reply = table.Handle(datagram);
    if (reply.empty()) continue;
    ProbeDatagram c;
    const auto tag_of_reply = tickmark::net::PeekProbeTag(reply);
    if (!tag_of_reply ||
        tickmark::net::DecodeProbeDatagram(reply, KeyFor(*tag_of_reply), &c) !=
            tickmark::net::ProbeDecodeResult::kOk ||
        c.kind != ProbeDatagramKind::kChallenge) {
      __builtin_trap();
    }
    issued[{c.tag, c.id}] = c.t1_session_ns;
    sampled.erase({c.tag, c.id});
  }
  const tickmark::net::UdpProbeCounters n = table.counters();
  if (n.received != sent || n.samples != samples ||
      n.challenged + n.samples + n.malformed + n.unknown_tag + n.bad_mac + n.replayed +
              n.wrong_kind !=
          n.received) {
    __builtin_trap();
  }
  return 0;
}

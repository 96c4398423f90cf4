// Fuzzes after-the-fact retiming (server/core/retime.h) with what the ledger
// holds of a client: probe timestamps (T2 and T3 are the client's, and a
// ledger may hold anything the live checks let through), the live model's
// restart and candidate marks, and event times as clients stamped them. Each
// probe is either arbitrary int64s or a plausible one (small delays around a
// moving base, an offset that may jump), so hostile and realistic sequences
// are both explored. Checks that nothing overflows (UBSan traps signed
// overflow and out-of-range float-to-int casts) and the contract: one result
// per event, a non-negative uncertainty, a kept event keeps exactly its live
// time and uncertainty, and segments start at 0 and rise.
#include <fuzzer/FuzzedDataProvider.h>

#include <cstddef>
#include <cstdint>
#include <vector>

#include "server/core/retime.h"

namespace {

using tickmark::ClientTime;
using tickmark::Duration;
using tickmark::ProbeTimestamps;
using tickmark::RetimeEvent;
using tickmark::RetimeOutcome;
using tickmark::RetimeProbe;
using tickmark::SessionTime;

ProbeTimestamps Probe(FuzzedDataProvider& in, int64_t* base, int64_t* offset) {
  if (in.ConsumeIntegralInRange(0, 7) == 0) {
    return {SessionTime::FromNanos(in.ConsumeIntegral<int64_t>()),
            ClientTime::FromNanos(in.ConsumeIntegral<int64_t>()),
            ClientTime::FromNanos(in.ConsumeIntegral<int64_t>()),
            SessionTime::FromNanos(in.ConsumeIntegral<int64_t>())};
  }
  // Plausible: up to ~2 s between probes, ms delays, now and then a jump.
  *base += in.ConsumeIntegralInRange<int64_t>(0, 2'000'000'000);
  if (in.ConsumeIntegralInRange(0, 15) == 0) {
    *offset += in.ConsumeIntegralInRange<int64_t>(-5'000'000'000, 5'000'000'000);
  }
  const int64_t t1 = *base;
  const int64_t forward = in.ConsumeIntegralInRange<int64_t>(-1'000'000, 50'000'000);
  const int64_t t2 = t1 + *offset + forward;
  const int64_t t3 = t2 + in.ConsumeIntegralInRange<int64_t>(0, 5'000'000);
  const int64_t t4 =
      t1 + forward + (t3 - t2) + in.ConsumeIntegralInRange<int64_t>(-1'000'000, 50'000'000);
  return {SessionTime::FromNanos(t1), ClientTime::FromNanos(t2), ClientTime::FromNanos(t3),
          SessionTime::FromNanos(t4)};
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  FuzzedDataProvider in(data, size);
  tickmark::RetimeOptions options;
  options.half_window = Duration::Millis(in.ConsumeIntegralInRange<int64_t>(1, 120'000));
  options.window_probes = in.ConsumeIntegralInRange(1, 32);
  options.min_probes = in.ConsumeIntegralInRange(1, 8);
  int64_t base = in.ConsumeIntegralInRange<int64_t>(0, int64_t{1} << 62);
  int64_t offset = in.ConsumeIntegralInRange<int64_t>(-(int64_t{1} << 61), int64_t{1} << 61);
  std::vector<RetimeProbe> probes;
  std::vector<RetimeEvent> events;
  while (in.remaining_bytes() > 0 && probes.size() + events.size() < 400) {
    if (in.ConsumeIntegralInRange(0, 2) != 0) {
      RetimeProbe p;
      p.t = Probe(in, &base, &offset);
      p.restart = in.ConsumeIntegralInRange(0, 15) == 0;
      p.candidate = in.ConsumeIntegralInRange(0, 15) == 0;
      probes.push_back(p);
      continue;
    }
    RetimeEvent e;
    e.client =
        ClientTime::FromNanos(in.ConsumeBool() ? in.ConsumeIntegral<int64_t>()
                                               : base + offset + in.ConsumeIntegral<int32_t>());
    e.live = SessionTime::FromNanos(in.ConsumeIntegral<int64_t>());
    e.live_uncertainty = Duration::Nanos(in.ConsumeIntegralInRange<int64_t>(0, INT64_MAX));
    e.probes_before = in.ConsumeBool() ? probes.size() : in.ConsumeIntegral<uint16_t>();
    e.arrival = SessionTime::FromNanos(in.ConsumeBool() ? 0 : base + in.ConsumeIntegral<int32_t>());
    events.push_back(e);
  }
  const std::vector<size_t> starts = tickmark::RetimeSegments(probes, options);
  if (probes.empty() != starts.empty() || (!starts.empty() && starts.front() != 0)) {
    __builtin_trap();
  }
  for (size_t i = 1; i < starts.size(); ++i) {
    if (starts[i] <= starts[i - 1] || starts[i] >= probes.size()) __builtin_trap();
  }
  const std::vector<tickmark::RetimedTime> out = tickmark::RetimeClock(probes, events, options);
  if (out.size() != events.size()) __builtin_trap();
  for (size_t i = 0; i < out.size(); ++i) {
    if (out[i].uncertainty < Duration::Zero()) __builtin_trap();
    if (out[i].outcome != RetimeOutcome::kRetimed &&
        (out[i].session != events[i].live || out[i].uncertainty != events[i].live_uncertainty)) {
      __builtin_trap();
    }
    (void)tickmark::RetimeOutcomeName(out[i].outcome);
  }
  return 0;
}

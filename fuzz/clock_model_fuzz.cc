// Fuzzes clock mapping (server/core/clock_model.h) with what clients
// control: the T2 and T3 of every probe answer (over the stream or the UDP
// probe port) and the event times of their feedback; T1 and T4 are the
// server's, but are fuzzed too. Each probe is either arbitrary int64s or a
// plausible one (small delays and offsets around a moving base), so both
// hostile and realistic sequences are explored. Checks that nothing
// overflows (UBSan traps signed overflow and out-of-range float-to-int
// casts) and that every result is usable: the drift finite and within its
// clamp, uncertainties and their terms non-negative, a verdict for every
// probe.
#include <cmath>
#include <cstddef>
#include <cstdint>

#include <fuzzer/FuzzedDataProvider.h>

#include "server/core/clock_model.h"

namespace {

using tickmark::ClientTime;
using tickmark::ClockModel;
using tickmark::Duration;
using tickmark::ProbeTimestamps;
using tickmark::SessionTime;

ProbeTimestamps Probe(FuzzedDataProvider& in, int64_t* base) {
  if (in.ConsumeBool()) {
    return {SessionTime::FromNanos(in.ConsumeIntegral<int64_t>()),
            ClientTime::FromNanos(in.ConsumeIntegral<int64_t>()),
            ClientTime::FromNanos(in.ConsumeIntegral<int64_t>()),
            SessionTime::FromNanos(in.ConsumeIntegral<int64_t>())};
  }
  // Plausible: up to ~1 s between probes, ±1000 s offset, ms delays.
  *base += in.ConsumeIntegralInRange<int64_t>(0, 1'000'000'000);
  const int64_t offset = in.ConsumeIntegralInRange<int64_t>(-1'000'000'000'000, 1'000'000'000'000);
  const int64_t t1 = *base;
  const int64_t t2 = t1 + offset + in.ConsumeIntegralInRange<int64_t>(-1'000'000, 50'000'000);
  const int64_t t3 = t2 + in.ConsumeIntegralInRange<int64_t>(-1'000, 5'000'000);
  const int64_t t4 = t1 + in.ConsumeIntegralInRange<int64_t>(-1'000'000, 100'000'000);
  return {SessionTime::FromNanos(t1), ClientTime::FromNanos(t2), ClientTime::FromNanos(t3),
          SessionTime::FromNanos(t4)};
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  FuzzedDataProvider in(data, size);
  ClockModel::Options options;
  options.filter_stages = in.ConsumeIntegralInRange(1, 16);
  ClockModel model(options);
  int64_t base = in.ConsumeIntegralInRange<int64_t>(0, int64_t{1} << 62);
  while (in.remaining_bytes() > 0) {
    if (in.ConsumeIntegralInRange(0, 3) != 0) {
      (void)tickmark::ProbeVerdictName(model.AddProbe(Probe(in, &base)));
      continue;
    }
    // A feedback event time, as the client stamped it.
    const ClientTime t = ClientTime::FromNanos(in.ConsumeBool()
                                                   ? in.ConsumeIntegral<int64_t>()
                                                   : base + in.ConsumeIntegral<int32_t>());
    (void)model.ToSession(t);
    if (model.UncertaintyAt(t) < Duration::Zero()) __builtin_trap();
    const tickmark::ClockEstimate e = model.estimate();
    if (!std::isfinite(e.drift_ppm) || std::fabs(e.drift_ppm) > options.max_drift_ppm) {
      __builtin_trap();
    }
    if (model.ready() && (e.uncertainty < Duration::Zero() || e.samples < 1)) __builtin_trap();
    // The uncertainty's terms (docs/time-model.md, "Uncertainty"): none negative.
    if (model.ready() && (e.asymmetry < Duration::Zero() || e.offset_scatter < Duration::Zero() ||
                          !(e.drift_error_ppm >= 0))) {
      __builtin_trap();
    }
  }
  return 0;
}

// Fuzzes the checks the live service runs on what trainers and agents send
// (server/rpc/validation.h), before anything is stored: a TrainerMessage or
// AgentMessage decoded from the bytes (protobuf ParseFromArray, so every
// field value the wire allows), the call's metadata token, a pair of
// Records for the resend comparison, and the times, limits and
// uncertainties around them from FuzzedDataProvider.
//
// Checks each function's stated contract against a reference computed in
// 128 bits, not only that nothing crashes (UBSan traps signed overflow):
// a validated feedback has a finite value within the limit, a validated step
// keeps its bounds, the hello mapping is exact or OUT_OF_RANGE, an accepted
// event time lies within its bound, a clamped one only before the first
// probe and with an uncertainty that covers the shift, and a record never
// differs from its own copy. A validated real-time reading is well formed,
// and ChooseTimeSource (server/core/disciplined_clock.h) maps through real
// time only when both sides are synchronised, with a bound below the round
// trip's that covers both kernels' bounds and the two routes' disagreement.
//
// Input layout (what fuzz/make_seeds.py writes): integers from the end, read
// in the order LLVMFuzzerTestOneInput takes them; from the front, `first_len`
// bytes of the first message, then the rest as the second (the metadata
// token for a hello, the resent Record for a resend).
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <string>

#include <fuzzer/FuzzedDataProvider.h>
#include <google/protobuf/stubs/logging.h>

#include "server/core/disciplined_clock.h"
#include "server/core/time.h"
#include "server/rpc/validation.h"
#include "tickmark/v1/records.pb.h"
#include "tickmark/v1/stream.pb.h"

namespace {

namespace v1 = tickmark::v1;
using tickmark::Duration;
using tickmark::SessionTime;
using tickmark::rpc::Limits;
using Wide = __int128;

constexpr int64_t kMax = std::numeric_limits<int64_t>::max();
constexpr int64_t kMin = std::numeric_limits<int64_t>::min();

void Require(bool promise) {
  if (!promise) __builtin_trap();
}

bool Fits(Wide v) { return v >= kMin && v <= kMax; }

// Limits as an operator might configure them: within ten years for times,
// and anything for the sizes. The defaults stay reachable (first byte 0).
Limits FuzzLimits(FuzzedDataProvider& in) {
  Limits limits;
  if (!in.ConsumeBool()) return limits;
  constexpr int64_t kTenYears = int64_t{10} * 366 * 86400 * 1'000'000'000;
  limits.max_state_bytes = in.ConsumeIntegral<uint32_t>();
  limits.max_features = in.ConsumeIntegral<uint32_t>();
  limits.max_abs_value = in.ConsumeFloatingPointInRange<double>(0, 1e12);
  limits.max_event_age = Duration::Nanos(in.ConsumeIntegralInRange<int64_t>(0, kTenYears));
  limits.max_event_future = Duration::Nanos(in.ConsumeIntegralInRange<int64_t>(0, kTenYears));
  limits.max_step_length = Duration::Nanos(in.ConsumeIntegralInRange<int64_t>(0, kTenYears));
  return limits;
}

bool ValidName(const std::string& s) {
  if (s.empty() || s.size() > 64) return false;
  for (char c : s) {
    const bool ok = (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') ||
                    c == '-' || c == '_' || c == '.' || c == ':';
    if (!ok) return false;
  }
  return true;
}

void CheckHello(const v1::Hello& hello, const std::string& metadata_token) {
  const bool ok = tickmark::rpc::ValidateHello(hello).ok();
  Require(ok == (ValidName(hello.client_id()) && hello.source_description().size() <= 256 &&
                 hello.software().size() <= 128));
  const bool agree = tickmark::rpc::CheckTokensAgree(hello.token(), metadata_token).ok();
  Require(agree == (hello.token().empty() || metadata_token.empty() ||
                    hello.token() == metadata_token));
  // Symmetric: which side carries which token does not matter.
  Require(agree == tickmark::rpc::CheckTokensAgree(metadata_token, hello.token()).ok());
}

void CheckProbe(const v1::ProbeReply& reply, SessionTime t4) {
  const int64_t t1 = reply.t1_session_ns(), t2 = reply.t2_client_ns(), t3 = reply.t3_client_ns();
  const bool ok =
      tickmark::rpc::ValidateProbeTimes(SessionTime::FromNanos(t1), t2, t3, t4).ok();
  // RFC 5905 §8: every difference and the sums of the offset and delay.
  const Wide a = Wide{t2} - t1, b = Wide{t3} - t4.nanos();
  const Wide turnaround = Wide{t3} - t2, round_trip = Wide{t4.nanos()} - t1;
  const bool fits = Fits(a) && Fits(b) && Fits(turnaround) && Fits(round_trip) && Fits(a + b) &&
                    Fits(round_trip - turnaround);
  Require(ok == fits);
}

// The mapping through the hello's offset, then the event-time rule.
void CheckFeedbackTime(int64_t client_ns, Duration hello_offset, Duration uncertainty,
                       SessionTime arrival, bool has_probe, Duration tolerance,
                       const Limits& limits) {
  const auto mapped = tickmark::rpc::MapThroughHelloOffset(client_ns, hello_offset);
  const Wide exact = Wide{client_ns} - hello_offset.nanos();
  Require(mapped.ok() == Fits(exact));
  if (!mapped.ok()) {
    Require(mapped.status().code() == absl::StatusCode::kOutOfRange);
    return;
  }
  Require(mapped->nanos() == exact);

  const SessionTime event = *mapped;
  const auto v = tickmark::rpc::JudgeEventTime(event, uncertainty, arrival, has_probe, tolerance,
                                               limits);
  const Wide ahead = Wide{event.nanos()} - arrival.nanos();
  const Wide bound = Wide{uncertainty.nanos()} + tolerance.nanos();  // both >= 0 here
  if (!v.status.ok()) {
    Require(v.status.code() == absl::StatusCode::kOutOfRange ||
            v.status.code() == absl::StatusCode::kInvalidArgument);
    // Refused only for a reason the rule names.
    Require(!Fits(ahead) || ahead > bound || -ahead > limits.max_event_age.nanos());
    return;
  }
  Require(Fits(ahead));
  if (v.clamped) {
    // Only while the model has no probe, only by a bounded amount, and the
    // widened uncertainty covers the shift.
    Require(!has_probe);
    Require(ahead > bound && ahead - bound <= limits.max_event_future.nanos());
    Require(v.event == arrival);
    Require(v.uncertainty >= uncertainty && Wide{v.uncertainty.nanos()} >= ahead);
    return;
  }
  Require(v.event == event && v.uncertainty == uncertainty);
  Require(ahead <= bound);
  Require(-ahead <= limits.max_event_age.nanos());
}

// The server's side of a message's arrival. Uncertainty and tolerance are
// half-widths (never negative); the hello offset is whatever the client's
// clock reading made it.
struct Context {
  Limits limits;
  SessionTime arrival;
  Duration hello_offset;
  Duration uncertainty;
  Duration tolerance;
  bool has_probe = false;
};

// A reading that passed validation, and the decision on it for either server
// state, with the context standing in for the server's side: its bound and
// state age from the tolerance, the event age and the disagreement from the
// hello offset (no disagreement without a probe), the round trip's
// uncertainty from the context's.
void CheckRealtime(int64_t realtime_ns, int64_t bound_ns, bool synced, const Context& c) {
  constexpr int64_t k16s = 16'000'000'000;  // the kernel's maxerror clamp (adjtimex(2))
  Require(realtime_ns >= 0 && bound_ns >= 0 && bound_ns <= k16s);
  if (synced) Require(realtime_ns > 0 && bound_ns > 0 && bound_ns < k16s);
  for (const bool server_synced : {false, true}) {
    tickmark::TimeSourceInputs in;
    in.client = {realtime_ns, Duration::Nanos(bound_ns), synced};
    in.server.synced = server_synced;
    in.server.max_error = Duration::Nanos(c.tolerance.nanos() % (k16s + 1));
    in.server_state_age = c.tolerance;
    in.event_age = tickmark::Abs(c.hello_offset);
    in.read_spread = Duration::Nanos(c.uncertainty.nanos() % 1'000'000);
    in.round_trip_uncertainty = c.uncertainty;
    if (c.has_probe) in.disagreement = c.hello_offset;
    const tickmark::TimeSourceDecision d = tickmark::ChooseTimeSource(in);
    if (d.source == tickmark::TimeSourceChoice::kRealtime) {
      Require(synced && server_synced && in.disagreement.has_value());
      Require(d.uncertainty == d.realtime_bound && d.uncertainty < in.round_trip_uncertainty);
      Require(Wide{d.uncertainty.nanos()} >= Wide{bound_ns} + in.server.max_error.nanos());
      Require(Wide{tickmark::Abs(*in.disagreement).nanos()} <=
              Wide{d.uncertainty.nanos()} + in.round_trip_uncertainty.nanos());
    } else {
      Require(d.uncertainty == in.round_trip_uncertainty);
    }
  }
}

void CheckFeedback(const v1::FeedbackMessage& f, const Context& c) {
  const Limits& limits = c.limits;
  if (!tickmark::rpc::ValidateFeedback(f, limits).ok()) return;
  Require(f.client_sequence() != 0);
  Require(std::isfinite(f.value()) && std::fabs(f.value()) <= limits.max_abs_value);
  Require(f.event_source_ns() > 0);
  Require(f.input().size() <= 64);
  CheckRealtime(f.event_realtime_ns(), f.realtime_bound_ns(), f.realtime_synced(), c);
  CheckFeedbackTime(f.event_source_ns(), c.hello_offset, c.uncertainty, c.arrival, c.has_probe,
                    c.tolerance, limits);
}

void CheckStep(const v1::StepMessage& s, const Context& c) {
  const Limits& limits = c.limits;
  if (!tickmark::rpc::ValidateStep(s, limits).ok()) return;
  Require(s.client_sequence() != 0 && s.start_agent_ns() > 0);
  if (s.end_agent_ns() != 0) {
    Require(s.end_agent_ns() > s.start_agent_ns());
    Require(Wide{s.end_agent_ns()} - s.start_agent_ns() <= limits.max_step_length.nanos());
  }
  Require(s.state().size() <= limits.max_state_bytes);
  Require(static_cast<uint64_t>(s.features_size()) <= limits.max_features);
  for (float x : s.features()) Require(std::isfinite(x));
  Require(s.action().size() <= 128);
  CheckRealtime(s.start_realtime_ns(), s.realtime_bound_ns(), s.realtime_synced(), c);

  const auto start = tickmark::rpc::MapThroughHelloOffset(s.start_agent_ns(), c.hello_offset);
  if (!start.ok()) return;
  const bool ok = tickmark::rpc::CheckStepTime(*start, c.uncertainty, c.arrival, limits).ok();
  const Wide ahead = Wide{start->nanos()} - c.arrival.nanos();
  if (ok) {
    Require(Fits(ahead));
    Require(ahead <= Wide{limits.max_event_future.nanos()} + c.uncertainty.nanos());
    Require(-ahead <= limits.max_event_age.nanos());
  }
}

// NaN never compares equal, so only a NaN-free record must equal itself
// (ValidateFeedback and ValidateStep refuse NaN, so no stored record has one).
bool NanFree(const v1::Record& r) {
  if (r.has_feedback() && std::isnan(r.feedback().value())) return false;
  if (r.has_step()) {
    for (float x : r.step().features()) {
      if (std::isnan(x)) return false;
    }
  }
  return true;
}

void CheckResend(const std::string& first, const std::string& second) {
  v1::Record stored, resent;
  if (!stored.ParseFromString(first)) return;
  const bool parsed = resent.ParseFromString(second);
  if (NanFree(stored)) {
    Require(!tickmark::rpc::DescribeContentMismatch(stored, stored).has_value());
    v1::Record copy;
    Require(copy.ParseFromString(stored.SerializeAsString()));
    Require(!tickmark::rpc::DescribeContentMismatch(stored, copy).has_value());
  }
  if (!parsed) return;
  const auto forward = tickmark::rpc::DescribeContentMismatch(stored, resent);
  const auto backward = tickmark::rpc::DescribeContentMismatch(resent, stored);
  if (NanFree(stored) && NanFree(resent)) Require(forward.has_value() == backward.has_value());
  if (stored.body_case() != resent.body_case()) Require(forward.has_value());
  if (forward) Require(!forward->empty());
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  static const bool quiet = [] {
    google::protobuf::SetLogHandler(nullptr);
    return true;
  }();
  (void)quiet;

  FuzzedDataProvider in(data, size);
  const int kind = in.ConsumeIntegralInRange<int>(0, 2);  // trainer, agent, resend
  Context c;
  c.limits = FuzzLimits(in);
  c.arrival = SessionTime::FromNanos(in.ConsumeIntegral<int64_t>());
  c.hello_offset = Duration::Nanos(in.ConsumeIntegral<int64_t>());
  c.uncertainty = Duration::Nanos(in.ConsumeIntegralInRange<int64_t>(0, kMax));
  c.tolerance = Duration::Nanos(in.ConsumeIntegralInRange<int64_t>(0, kMax));
  c.has_probe = in.ConsumeBool();
  const size_t first_len = in.ConsumeIntegralInRange<size_t>(0, 1 << 16);
  const std::string first = in.ConsumeBytesAsString(first_len);
  const std::string second = in.ConsumeRemainingBytesAsString();

  switch (kind) {
    case 0: {
      v1::TrainerMessage m;
      if (!m.ParseFromString(first)) return 0;
      if (m.has_hello()) CheckHello(m.hello(), second);
      if (m.has_probe_reply()) CheckProbe(m.probe_reply(), c.arrival);
      if (m.has_feedback()) CheckFeedback(m.feedback(), c);
      break;
    }
    case 1: {
      v1::AgentMessage m;
      if (!m.ParseFromString(first)) return 0;
      if (m.has_hello()) CheckHello(m.hello(), second);
      if (m.has_probe_reply()) CheckProbe(m.probe_reply(), c.arrival);
      if (m.has_step()) CheckStep(m.step(), c);
      break;
    }
    default:
      CheckResend(first, second);
  }
  return 0;
}

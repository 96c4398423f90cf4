// Checks on what trainers and agents send, before anything is stored.
//
// Pure functions: no I/O, no locks, no clocks read; every input is a
// parameter, so a fuzz target or a table-driven test can call them with any
// bytes. A check that fails returns a Status whose message names the field
// and the bound (what the client sees in its Ack or final status).
//
// Thread safety: all functions are thread-safe (they touch only arguments).
#ifndef TICKMARK_SERVER_RPC_VALIDATION_H_
#define TICKMARK_SERVER_RPC_VALIDATION_H_

#include <optional>
#include <string>
#include <string_view>

#include "absl/status/status.h"
#include "server/core/clock_model.h"
#include "server/core/time.h"
#include "server/rpc/session_hub.h"
#include "tickmark/v1/records.pb.h"
#include "tickmark/v1/stream.pb.h"

namespace tickmark::rpc {

// The fields of a Hello (the token is checked by the token authority).
absl::Status ValidateHello(const tickmark::v1::Hello& hello);

// The hello's token against the call's authorization metadata: both may be
// given, but then they must be the same secret (UNAUTHENTICATED otherwise).
absl::Status CheckTokensAgree(std::string_view hello_token, std::string_view metadata_token);

// The fields of one feedback message (not its time; see JudgeEventTime).
// Its optional real-time reading (docs/time-model.md, "Disciplined clocks"):
// event_realtime_ns >= 0 (0: none), realtime_bound_ns within [0, 16 s] (the
// kernel's maxerror clamp), and realtime_synced only with a reading and a
// bound above 0 and below 16 s. Steps' start_realtime_ns likewise.
absl::Status ValidateFeedback(const tickmark::v1::FeedbackMessage& f, const Limits& limits);

// A calibration run id: 1-64 of [A-Za-z0-9._-].
bool IsValidRunId(std::string_view run);

// The fields of one calibration message (not its times; see JudgeEventTime):
// client sequence, run id, one body; a move's number >= 1 and shown time
// > 0; an answer's event time > 0; labels and the display note bounded.
absl::Status ValidateCalibration(const tickmark::v1::CalibrationMessage& m);

// The fields of one step message (not its time, not its order).
absl::Status ValidateStep(const tickmark::v1::StepMessage& s, const Limits& limits);

// A sync pulse (docs/sync.md): a sequence, a direction, a line that fits it
// (DTR/RTS out, CTS/DSR/DCD in), a positive event time, a bracket of at most
// 1 s, a reason, a pulse index from 1 and a device path of at most 256 bytes.
absl::Status ValidateSyncPulse(const tickmark::v1::SyncPulseMessage& m);

// A probe answer: every RFC 5905 §8 on-wire difference must be computable
// in 64 bits (an absurd pair such as t2 = INT64_MIN, t3 = INT64_MAX would
// wrap and move the clock model by hours). `t1` and `t4` are the server's
// stamps. The message ("rejected_out_of_range", in the style of the clock
// model's verdict names) is the reason recorded with the rejected probe;
// ordering is left to ClockModel::AddProbe.
absl::Status ValidateProbeTimes(SessionTime t1, int64_t t2_client_ns, int64_t t3_client_ns,
                                SessionTime t4);

// Maps a client reading through the hello's crude offset (before any probe
// came back): client_ns − offset, or OUT_OF_RANGE if that does not fit.
absl::StatusOr<SessionTime> MapThroughHelloOffset(int64_t client_ns, Duration hello_offset);

// What to do with an event time (a feedback's mapped time) given when it
// arrived. The rule (DEVELOPERS.md, "Limits on clients"):
//  - an event may lie after its arrival by at most its stated uncertainty
//    plus `tolerance` (0 by default); beyond that it is refused with
//    OUT_OF_RANGE and not credited — when the clock model has had a probe;
//  - while the model is new (no probe back yet, the time was mapped through
//    the hello's crude offset), such an event is clamped to its arrival and
//    flagged (`clamped`), with its uncertainty widened to cover the shift,
//    unless it lies more than limits.max_event_future beyond the bound:
//    then it is refused too;
//  - an event older than limits.max_event_age before its arrival is refused.
struct EventTimeVerdict {
  absl::Status status;   // OK: store with the fields below
  SessionTime event;     // the time to store and credit
  Duration uncertainty;  // its half-width
  bool clamped = false;  // moved to the arrival time
};
EventTimeVerdict JudgeEventTime(SessionTime event, Duration uncertainty, SessionTime arrival,
                                bool model_has_probe, Duration tolerance, const Limits& limits);

// Plausibility of a step's start (agents may publish a step slightly ahead
// of its start): within limits.max_event_future + uncertainty after arrival
// and limits.max_event_age before it.
absl::Status CheckStepTime(SessionTime start, Duration uncertainty, SessionTime arrival,
                           const Limits& limits);

// A resend under a used client sequence must carry the same content as the
// stored record. Compares what the client sent (not what the server
// stamped); returns a description of the first difference, or nullopt when
// the content is the same.
std::optional<std::string> DescribeContentMismatch(const tickmark::v1::Record& stored,
                                                   const tickmark::v1::Record& resent);

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_VALIDATION_H_

#include "server/rpc/validation.h"

#include <cmath>

#include "absl/status/statusor.h"
#include "server/base/strings.h"
#include "server/core/disciplined_clock.h"
#include "server/rpc/auth.h"

namespace tickmark::rpc {
namespace {

namespace v1 = tickmark::v1;

// a − b, or nullopt if it does not fit in 64 bits.
std::optional<int64_t> Sub(int64_t a, int64_t b) {
  int64_t r = 0;
  if (__builtin_sub_overflow(a, b, &r)) return std::nullopt;
  return r;
}
std::optional<int64_t> Add(int64_t a, int64_t b) {
  int64_t r = 0;
  if (__builtin_add_overflow(a, b, &r)) return std::nullopt;
  return r;
}

// The optional real-time fields of a feedback or step (stream.proto):
// `reading` names the reading's field in messages.
absl::Status ValidateRealtime(const char* reading, int64_t realtime_ns, int64_t bound_ns,
                              bool synced) {
  if (realtime_ns < 0) return absl::InvalidArgumentError(Cat(reading, " must be >= 0 (0: none)"));
  // adjtimex(2)/ntp_gettime(3): the kernel clamps maxerror at 16 s.
  const int64_t clamp = kMaxDisciplineBound.nanos();
  if (bound_ns < 0 || bound_ns > clamp) {
    return absl::InvalidArgumentError("realtime_bound_ns must be within [0, 16 s] (0: none)");
  }
  if (synced && realtime_ns == 0) {
    return absl::InvalidArgumentError(Cat("realtime_synced needs ", reading));
  }
  if (synced && (bound_ns == 0 || bound_ns == clamp)) {
    return absl::InvalidArgumentError(
        "realtime_synced needs a realtime_bound_ns above 0 and below 16 s");
  }
  return absl::OkStatus();
}

}  // namespace

absl::Status ValidateHello(const v1::Hello& hello) {
  if (!IsValidName(hello.client_id())) {
    return absl::InvalidArgumentError("client_id must be 1-64 characters of [A-Za-z0-9._:-]");
  }
  if (hello.source_description().size() > 256 || hello.software().size() > 128) {
    return absl::InvalidArgumentError("source_description (256) or software (128) too long");
  }
  return absl::OkStatus();
}

absl::Status CheckTokensAgree(std::string_view hello_token, std::string_view metadata_token) {
  if (hello_token.empty() || metadata_token.empty() || hello_token == metadata_token) {
    return absl::OkStatus();
  }
  return absl::UnauthenticatedError(
      "the hello's token and the call's authorization token differ; send one token");
}

absl::Status ValidateFeedback(const v1::FeedbackMessage& f, const Limits& limits) {
  if (f.client_sequence() == 0) return absl::InvalidArgumentError("client_sequence starts at 1");
  if (!std::isfinite(f.value()) || std::fabs(f.value()) > limits.max_abs_value) {
    return absl::InvalidArgumentError(
        Cat("feedback value must be finite and within ±", limits.max_abs_value));
  }
  if (f.event_source_ns() <= 0) return absl::InvalidArgumentError("event_source_ns must be > 0");
  if (f.input().size() > 64) return absl::InvalidArgumentError("input label over 64 bytes");
  if (!f.audio_sha256().empty() && f.audio_sha256().size() != 32) {
    return absl::InvalidArgumentError("audio_sha256 must be empty or 32 bytes");
  }
  return ValidateRealtime("event_realtime_ns", f.event_realtime_ns(), f.realtime_bound_ns(),
                          f.realtime_synced());
}

bool IsValidRunId(std::string_view run) {
  if (run.empty() || run.size() > 64) return false;
  for (char c : run) {
    const bool ok = (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') ||
                    c == '.' || c == '_' || c == '-';
    if (!ok) return false;
  }
  return true;
}

absl::Status ValidateCalibration(const v1::CalibrationMessage& m) {
  if (m.client_sequence() == 0) return absl::InvalidArgumentError("client_sequence starts at 1");
  if (!IsValidRunId(m.run())) {
    return absl::InvalidArgumentError("calibration run must be 1-64 characters of [A-Za-z0-9._-]");
  }
  switch (m.body_case()) {
    case v1::CalibrationMessage::kMove:
      if (m.move().move() == 0) return absl::InvalidArgumentError("move numbers start at 1");
      if (m.move().shown_source_ns() <= 0) {
        return absl::InvalidArgumentError("shown_source_ns must be > 0");
      }
      if (m.move().detail().size() > 64) {
        return absl::InvalidArgumentError("move detail over 64 bytes");
      }
      return absl::OkStatus();
    case v1::CalibrationMessage::kAnswer:
      if (m.answer().event_source_ns() <= 0) {
        return absl::InvalidArgumentError("event_source_ns must be > 0");
      }
      if (m.answer().input().size() > 64) {
        return absl::InvalidArgumentError("input label over 64 bytes");
      }
      return absl::OkStatus();
    case v1::CalibrationMessage::kFinish:
      if (m.finish().min_answers() > 100'000) {
        return absl::InvalidArgumentError("min_answers must be at most 100000");
      }
      if (m.finish().display_note().size() > 1024) {
        return absl::InvalidArgumentError("display_note over 1024 bytes");
      }
      return absl::OkStatus();
    case v1::CalibrationMessage::BODY_NOT_SET:
      break;
  }
  return absl::InvalidArgumentError("a calibration message needs a move, an answer or a finish");
}

absl::Status ValidateSyncPulse(const v1::SyncPulseMessage& m) {
  if (m.client_sequence() == 0) return absl::InvalidArgumentError("client_sequence starts at 1");
  const std::string& line = m.line();
  switch (m.direction()) {
    case v1::SYNC_DIRECTION_OUT:
      if (line != "DTR" && line != "RTS") {
        return absl::InvalidArgumentError("an outgoing sync line is DTR or RTS");
      }
      break;
    case v1::SYNC_DIRECTION_IN:
      if (line != "CTS" && line != "DSR" && line != "DCD") {
        return absl::InvalidArgumentError("an incoming sync line is CTS, DSR or DCD");
      }
      break;
    default:
      return absl::InvalidArgumentError("sync pulse direction must be out or in");
  }
  if (m.event_source_ns() <= 0) return absl::InvalidArgumentError("event_source_ns must be > 0");
  if (m.source_uncertainty_ns() < 0 || m.source_uncertainty_ns() > 1'000'000'000) {
    return absl::InvalidArgumentError("source_uncertainty_ns must be in [0, 1 s]");
  }
  if (m.reason() != v1::SYNC_REASON_INTERVAL && m.reason() != v1::SYNC_REASON_MARKER &&
      m.reason() != v1::SYNC_REASON_EXTERNAL) {
    return absl::InvalidArgumentError("sync pulse reason must be interval, marker or external");
  }
  if (m.pulse_index() == 0) return absl::InvalidArgumentError("pulse_index starts at 1");
  if (m.device().size() > 256) return absl::InvalidArgumentError("device over 256 bytes");
  return absl::OkStatus();
}

absl::Status ValidateStep(const v1::StepMessage& s, const Limits& limits) {
  if (s.client_sequence() == 0) return absl::InvalidArgumentError("client_sequence starts at 1");
  if (s.start_agent_ns() <= 0) return absl::InvalidArgumentError("start_agent_ns must be > 0");
  if (s.end_agent_ns() != 0) {
    if (s.end_agent_ns() <= s.start_agent_ns()) {
      return absl::InvalidArgumentError("a step must end after it starts");
    }
    // Both positive here, so the difference cannot overflow.
    if (s.end_agent_ns() - s.start_agent_ns() > limits.max_step_length.nanos()) {
      return absl::InvalidArgumentError(
          Cat("a step may last at most ", limits.max_step_length.seconds(), " s"));
    }
  }
  if (s.state().size() > limits.max_state_bytes) {
    return absl::InvalidArgumentError(
        Cat("state is ", s.state().size(), " bytes; the limit is ", limits.max_state_bytes));
  }
  if (static_cast<uint32_t>(s.features_size()) > limits.max_features) {
    return absl::InvalidArgumentError(Cat("at most ", limits.max_features, " features per step"));
  }
  for (float x : s.features()) {
    if (!std::isfinite(x)) return absl::InvalidArgumentError("features must be finite");
  }
  if (s.action().size() > 128) return absl::InvalidArgumentError("action name over 128 bytes");
  return ValidateRealtime("start_realtime_ns", s.start_realtime_ns(), s.realtime_bound_ns(),
                          s.realtime_synced());
}

absl::Status ValidateProbeTimes(SessionTime t1, int64_t t2_client_ns, int64_t t3_client_ns,
                                SessionTime t4) {
  // RFC 5905 §8: offset = ((T2 − T1) + (T3 − T4)) / 2, delay = (T4 − T1) − (T3 − T2).
  // Order (T3 < T2, T4 < T1) is the clock model's to judge; here only what
  // would wrap.
  const auto a = Sub(t2_client_ns, t1.nanos());
  const auto b = Sub(t3_client_ns, t4.nanos());
  const auto turnaround = Sub(t3_client_ns, t2_client_ns);
  const auto round_trip = Sub(t4.nanos(), t1.nanos());
  if (!a || !b || !turnaround || !round_trip || !Add(*a, *b) || !Sub(*round_trip, *turnaround)) {
    return absl::OutOfRangeError("rejected_out_of_range");
  }
  return absl::OkStatus();
}

absl::StatusOr<SessionTime> MapThroughHelloOffset(int64_t client_ns, Duration hello_offset) {
  const auto mapped = Sub(client_ns, hello_offset.nanos());
  if (!mapped) return absl::OutOfRangeError("time out of range for this client's clock");
  return SessionTime::FromNanos(*mapped);
}

EventTimeVerdict JudgeEventTime(SessionTime event, Duration uncertainty, SessionTime arrival,
                                bool model_has_probe, Duration tolerance, const Limits& limits) {
  EventTimeVerdict v{absl::OkStatus(), event, uncertainty, false};
  const auto ahead_ns = Sub(event.nanos(), arrival.nanos());
  if (!ahead_ns) {
    v.status = absl::OutOfRangeError("event time out of range");
    return v;
  }
  const Duration ahead = Duration::Nanos(*ahead_ns);
  const Duration bound = uncertainty + tolerance;
  if (ahead > bound) {
    if (model_has_probe || ahead - bound > limits.max_event_future) {
      v.status = absl::OutOfRangeError(Cat("event time lies ", ahead.seconds(),
                                           " s after its arrival, beyond its stated "
                                           "uncertainty of ",
                                           uncertainty.seconds(),
                                           " s: not credited; check the source clock"));
      return v;
    }
    v.event = arrival;
    v.uncertainty = ahead > uncertainty ? ahead : uncertainty;
    v.clamped = true;
    return v;
  }
  if (-ahead > limits.max_event_age) {
    v.status = absl::InvalidArgumentError(Cat("event time is ", (-ahead).seconds(),
                                              " s before its arrival (limit ",
                                              limits.max_event_age.seconds(), " s)"));
  }
  return v;
}

absl::Status CheckStepTime(SessionTime start, Duration uncertainty, SessionTime arrival,
                           const Limits& limits) {
  const auto ahead_ns = Sub(start.nanos(), arrival.nanos());
  if (!ahead_ns) return absl::OutOfRangeError("step start out of range");
  const Duration ahead = Duration::Nanos(*ahead_ns);
  if (ahead > limits.max_event_future + uncertainty) {
    return absl::InvalidArgumentError(
        Cat("step starts ", ahead.seconds(), " s after its arrival (limit ",
            (limits.max_event_future + uncertainty).seconds(), " s): check the agent clock"));
  }
  if (-ahead > limits.max_event_age) {
    return absl::InvalidArgumentError(Cat("step start is ", (-ahead).seconds(),
                                          " s before its arrival (limit ",
                                          limits.max_event_age.seconds(), " s)"));
  }
  return absl::OkStatus();
}

std::optional<std::string> DescribeContentMismatch(const v1::Record& stored,
                                                   const v1::Record& resent) {
  if (stored.body_case() != resent.body_case()) return "a different kind of record";
  if (stored.has_feedback()) {
    const v1::Feedback& a = stored.feedback();
    const v1::Feedback& b = resent.feedback();
    if (a.value() != b.value()) return Cat("value ", b.value(), " (stored: ", a.value(), ")");
    if (a.event_source_ns() != b.event_source_ns()) {
      return Cat("event_source_ns ", b.event_source_ns(), " (stored: ", a.event_source_ns(), ")");
    }
    if (a.input() != b.input()) return Cat("input '", b.input(), "' (stored: '", a.input(), "')");
    if (a.event_realtime_ns() != b.event_realtime_ns()) {
      return Cat("event_realtime_ns ", b.event_realtime_ns(), " (stored: ", a.event_realtime_ns(),
                 ")");
    }
    if (a.audio_sha256() != b.audio_sha256()) return std::string("audio_sha256");
    return std::nullopt;
  }
  if (stored.has_step()) {
    const v1::Step& a = stored.step();
    const v1::Step& b = resent.step();
    if (a.step_id() != b.step_id())
      return Cat("step_id ", b.step_id(), " (stored: ", a.step_id(), ")");
    if (a.episode() != b.episode())
      return Cat("episode ", b.episode(), " (stored: ", a.episode(), ")");
    if (a.start_agent_ns() != b.start_agent_ns()) {
      return Cat("start_agent_ns ", b.start_agent_ns(), " (stored: ", a.start_agent_ns(), ")");
    }
    if (a.end_agent_ns() != b.end_agent_ns()) {
      return Cat("end_agent_ns ", b.end_agent_ns(), " (stored: ", a.end_agent_ns(), ")");
    }
    if (a.start_realtime_ns() != b.start_realtime_ns()) {
      return Cat("start_realtime_ns ", b.start_realtime_ns(), " (stored: ", a.start_realtime_ns(),
                 ")");
    }
    if (a.action() != b.action())
      return Cat("action '", b.action(), "' (stored: '", a.action(), "')");
    if (a.state() != b.state()) return std::string("state bytes");
    if (a.features_size() != b.features_size()) return std::string("feature count");
    for (int i = 0; i < a.features_size(); ++i) {
      // Bitwise, so that a resent NaN-free vector compares exactly.
      if (a.features(i) != b.features(i)) return Cat("feature ", i);
    }
    return std::nullopt;
  }
  if (stored.has_sync_pulse()) {
    const v1::SyncPulse& a = stored.sync_pulse();
    const v1::SyncPulse& b = resent.sync_pulse();
    if (a.event_source_ns() != b.event_source_ns()) {
      return Cat("event_source_ns ", b.event_source_ns(), " (stored: ", a.event_source_ns(), ")");
    }
    if (a.line() != b.line()) return Cat("line ", b.line(), " (stored: ", a.line(), ")");
    if (a.level() != b.level()) return std::string("level");
    if (a.pulse_index() != b.pulse_index()) {
      return Cat("pulse_index ", b.pulse_index(), " (stored: ", a.pulse_index(), ")");
    }
    return std::nullopt;
  }
  if (stored.has_calibration_event()) {
    const v1::CalibrationEvent& a = stored.calibration_event();
    const v1::CalibrationEvent& b = resent.calibration_event();
    if (a.run() != b.run()) return Cat("run '", b.run(), "' (stored: '", a.run(), "')");
    if (a.kind() != b.kind()) return std::string("a move against an answer");
    if (a.move() != b.move()) return Cat("move ", b.move(), " (stored: ", a.move(), ")");
    if (a.at_source_ns() != b.at_source_ns()) {
      return Cat("source time ", b.at_source_ns(), " (stored: ", a.at_source_ns(), ")");
    }
    if (a.approve() != b.approve()) return std::string("approve");
    if (a.practice() != b.practice()) return std::string("practice");
    if (a.detail() != b.detail()) {
      return Cat("detail '", b.detail(), "' (stored: '", a.detail(), "')");
    }
    return std::nullopt;
  }
  return std::nullopt;
}

}  // namespace tickmark::rpc

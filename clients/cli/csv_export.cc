#include "clients/cli/csv_export.h"

#include <charconv>
#include <cstdint>

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;
using R = v1::Record;

std::string Number(double v) {
  char buf[32];
  auto r = std::to_chars(buf, buf + sizeof buf, v);  // shortest round-trip form
  return std::string(buf, r.ptr);
}

constexpr const char* kSession = "session time";
constexpr const char* kNoClock = "";

CsvColumn Int(std::string name, std::string unit, std::string clock, std::string meaning,
              std::function<int64_t(const R&)> f) {
  return {std::move(name),  "integer",          std::move(unit),
          std::move(clock), std::move(meaning), [f](const R& r) { return std::to_string(f(r)); }};
}
CsvColumn Count(std::string name, std::string meaning, std::function<uint64_t(const R&)> f) {
  return {std::move(name), "integer",          "",
          kNoClock,        std::move(meaning), [f](const R& r) { return std::to_string(f(r)); }};
}
CsvColumn Num(std::string name, std::string unit, std::string meaning,
              std::function<double(const R&)> f) {
  return {std::move(name), "number",           std::move(unit),
          kNoClock,        std::move(meaning), [f](const R& r) { return Number(f(r)); }};
}
CsvColumn Str(std::string name, std::string meaning, std::function<std::string(const R&)> f) {
  return {std::move(name), "string", "", kNoClock, std::move(meaning), std::move(f)};
}
CsvColumn Bool(std::string name, std::string meaning, std::function<bool(const R&)> f) {
  return {std::move(name),
          "boolean",
          "",
          kNoClock,
          std::move(meaning),
          [f](const R& r) { return std::string(f(r) ? "1" : "0"); }};
}
// A time on session time: nanoseconds since the Unix epoch (UTC-anchored).
CsvColumn SessionNs(std::string name, std::string meaning, std::function<int64_t(const R&)> f) {
  return Int(std::move(name), "ns", kSession, std::move(meaning), std::move(f));
}
// A duration, in nanoseconds, on no particular clock.
CsvColumn DurationNs(std::string name, std::string meaning, std::function<int64_t(const R&)> f) {
  return Int(std::move(name), "ns", kNoClock, std::move(meaning), std::move(f));
}

std::string SyncDirectionWord(v1::SyncDirection d) {
  switch (d) {
    case v1::SYNC_DIRECTION_OUT: return "out";
    case v1::SYNC_DIRECTION_IN: return "in";
    default: return "";
  }
}

std::string SyncReasonWord(v1::SyncReason r) {
  switch (r) {
    case v1::SYNC_REASON_INTERVAL: return "interval";
    case v1::SYNC_REASON_MARKER: return "marker";
    case v1::SYNC_REASON_EXTERNAL: return "external";
    default: return "";
  }
}

std::string TimeSourceWord(v1::TimeSource s) {
  switch (s) {
    case v1::TIME_SOURCE_REALTIME:
      return "realtime";
    default:
      return "round_trip";
  }
}

std::vector<CsvColumn> WithCommon(std::vector<CsvColumn> columns) {
  std::vector<CsvColumn> all = {
      Str("session_id", "the session (s-...)", [](const R& r) { return r.session_id(); }),
      Count("sequence", "the record's sequence number in its session (1, 2, ... no gaps)",
            [](const R& r) { return r.sequence(); }),
      SessionNs("written_session_ns", "when the server wrote the record",
                [](const R& r) { return r.written_session_ns(); }),
  };
  for (auto& c : columns) all.push_back(std::move(c));
  return all;
}

std::vector<CsvTable> MakeTables() {
  std::vector<CsvTable> t;
  t.push_back({"feedback.csv", R::kFeedback, v1::RECORD_KIND_FEEDBACK,
               "one row per feedback a trainer gave",
               WithCommon({
                   Str("client_id", "the source client that sent it",
                       [](const R& r) { return r.feedback().client_id(); }),
                   Count("client_sequence", "the client's own counter",
                         [](const R& r) { return r.feedback().client_sequence(); }),
                   Str("trainer", "the trainer's pseudonym",
                       [](const R& r) { return r.feedback().trainer(); }),
                   Num("value", "", "evaluation: +1 approve, -1 disapprove, or graded",
                       [](const R& r) { return r.feedback().value(); }),
                   Str("input", "the input the source read (\"key:g\", \"pedal:left\")",
                       [](const R& r) { return r.feedback().input(); }),
                   Int("event_source_ns", "ns", "source clock",
                       "when the source observed the act, on the source device's own clock",
                       [](const R& r) { return r.feedback().event_source_ns(); }),
                   SessionNs("event_session_ns", "the act, mapped to session time",
                             [](const R& r) { return r.feedback().event_session_ns(); }),
                   DurationNs("uncertainty_ns", "half-width of event_session_ns's uncertainty",
                              [](const R& r) { return r.feedback().uncertainty_ns(); }),
                   SessionNs("arrival_session_ns", "when the server received it",
                             [](const R& r) { return r.feedback().arrival_session_ns(); }),
                   Bool("late", "arrived later than the session's allowed lateness",
                        [](const R& r) { return r.feedback().late(); }),
                   Bool("event_clamped", "event time moved to the arrival (no probe yet)",
                        [](const R& r) { return r.feedback().event_clamped(); }),
                   Str("time_source", "how the event was mapped: round_trip or realtime",
                       [](const R& r) { return TimeSourceWord(r.feedback().time_source()); }),
               })});
  t.push_back(
      {"steps.csv", R::kStep, v1::RECORD_KIND_STEP,
       "one row per agent step (decision over an interval)",
       WithCommon({
           Str("client_id", "the agent client that sent it",
               [](const R& r) { return r.step().client_id(); }),
           Count("client_sequence", "the client's own counter",
                 [](const R& r) { return r.step().client_sequence(); }),
           Str("agent", "the agent's name", [](const R& r) { return r.step().agent(); }),
           Count("step_id", "the agent's own id of the step",
                 [](const R& r) { return r.step().step_id(); }),
           Count("episode", "episode number (0: none)",
                 [](const R& r) { return r.step().episode(); }),
           Str("action", "the action taken", [](const R& r) { return r.step().action(); }),
           Int("start_agent_ns", "ns", "agent clock", "start, on the agent's own clock",
               [](const R& r) { return r.step().start_agent_ns(); }),
           Int("end_agent_ns", "ns", "agent clock",
               "end on the agent's clock; 0: until the agent's next step",
               [](const R& r) { return r.step().end_agent_ns(); }),
           SessionNs("start_session_ns", "start, mapped to session time",
                     [](const R& r) { return r.step().start_session_ns(); }),
           SessionNs("end_session_ns", "end, mapped to session time; 0: open-ended",
                     [](const R& r) { return r.step().end_session_ns(); }),
           DurationNs("uncertainty_ns", "half-width of the mapped times' uncertainty",
                      [](const R& r) { return r.step().uncertainty_ns(); }),
           SessionNs("arrival_session_ns", "when the server received it",
                     [](const R& r) { return r.step().arrival_session_ns(); }),
           Count("feature_count", "length of the step's feature vector",
                 [](const R& r) { return static_cast<uint64_t>(r.step().features_size()); }),
           Bool("late", "arrived later than the session's allowed lateness",
                [](const R& r) { return r.step().late(); }),
           Str("time_source", "how the times were mapped: round_trip or realtime",
               [](const R& r) { return TimeSourceWord(r.step().time_source()); }),
       })});
  t.push_back(
      {"credit.csv", R::kCredit, v1::RECORD_KIND_CREDIT,
       "one row per share of a feedback given to a step (live credit)",
       WithCommon({
           Count("feedback_sequence", "sequence of the feedback record",
                 [](const R& r) { return r.credit().feedback_sequence(); }),
           Count("step_sequence", "sequence of the step record",
                 [](const R& r) { return r.credit().step_sequence(); }),
           Str("trainer", "the trainer's pseudonym",
               [](const R& r) { return r.credit().trainer(); }),
           Str("agent", "the agent's name", [](const R& r) { return r.credit().agent(); }),
           Count("step_id", "the agent's id of the step",
                 [](const R& r) { return r.credit().step_id(); }),
           Num("credit", "", "share F(t_f - start) - F(t_f - end), 0..1",
               [](const R& r) { return r.credit().credit(); }),
           Num("value", "", "the feedback's value", [](const R& r) { return r.credit().value(); }),
           Num("weight", "", "the trainer's weight",
               [](const R& r) { return r.credit().weight(); }),
           Str("kernel", "the delay kernel in force, canonical text",
               [](const R& r) { return r.credit().kernel(); }),
       })});
  t.push_back(
      {"labels.csv", R::kLabel, v1::RECORD_KIND_LABEL,
       "one row per step's credited value once settled",
       WithCommon({
           Count("step_sequence", "sequence of the step record",
                 [](const R& r) { return r.label().step_sequence(); }),
           Str("agent", "the agent's name", [](const R& r) { return r.label().agent(); }),
           Count("step_id", "the agent's id of the step",
                 [](const R& r) { return r.label().step_id(); }),
           Num("value", "", "sum of credit x value x trainer weight",
               [](const R& r) { return r.label().value(); }),
           Num("weight", "", "sum of credit", [](const R& r) { return r.label().weight(); }),
           Bool("settled", "no later feedback can change it",
                [](const R& r) { return r.label().settled(); }),
           SessionNs("start_session_ns", "the step's start as credited",
                     [](const R& r) { return r.label().start_session_ns(); }),
           SessionNs("end_session_ns", "the step's end as credited",
                     [](const R& r) { return r.label().end_session_ns(); }),
           Str("parts", "each trainer's part: trainer:value:weight, separated by ';'",
               [](const R& r) {
                 std::string out;
                 for (const auto& p : r.label().parts()) {
                   out += (out.empty() ? "" : ";") + p.trainer() + ":" + Number(p.value()) + ":" +
                          Number(p.weight());
                 }
                 return out;
               }),
       })});
  t.push_back(
      {"unmatched.csv", R::kUnmatched, v1::RECORD_KIND_UNMATCHED,
       "one row per feedback (or step) that got no credit, and why",
       WithCommon({
           Count("feedback_sequence", "the feedback record (0: a step is meant)",
                 [](const R& r) { return r.unmatched().feedback_sequence(); }),
           Str("trainer", "the trainer's pseudonym",
               [](const R& r) { return r.unmatched().trainer(); }),
           Count("step_sequence", "the step record (0: a feedback is meant)",
                 [](const R& r) { return r.unmatched().step_sequence(); }),
           Str("agent", "the agent's name", [](const R& r) { return r.unmatched().agent(); }),
           Str("reason", "why it got no credit", [](const R& r) { return r.unmatched().reason(); }),
       })});
  t.push_back({"markers.csv", R::kMarker, v1::RECORD_KIND_MARKER,
               "one row per annotation on the timeline",
               WithCommon({
                   SessionNs("at_session_ns", "where the marker stands",
                             [](const R& r) { return r.marker().at_session_ns(); }),
                   Str("text", "the marker's text", [](const R& r) { return r.marker().text(); }),
                   Str("author", "who added it", [](const R& r) { return r.marker().author(); }),
               })});
  t.push_back(
      {"sync_pulses.csv", R::kSyncPulse, v1::RECORD_KIND_SYNC_PULSE,
       "one row per edge of a sync line shared with another recorder (docs/sync.md)",
       WithCommon({
           Str("client_id", "the client that drove or saw the line",
               [](const R& r) { return r.sync_pulse().client_id(); }),
           Str("trainer", "the pseudonym of the client's token",
               [](const R& r) { return r.sync_pulse().trainer(); }),
           Str("direction", "out: this client drove the line; in: another system did",
               [](const R& r) { return SyncDirectionWord(r.sync_pulse().direction()); }),
           Str("line", "DTR or RTS (out); CTS, DSR or DCD (in)",
               [](const R& r) { return r.sync_pulse().line(); }),
           Bool("level", "the line's level after the edge (1 asserted)",
                [](const R& r) { return r.sync_pulse().level(); }),
           Str("reason", "interval, marker or external",
               [](const R& r) { return SyncReasonWord(r.sync_pulse().reason()); }),
           Count("pulse_index", "counts the line's pulses from 1 per client run; both edges share it",
                 [](const R& r) { return r.sync_pulse().pulse_index(); }),
           Count("marker_sequence", "the marker record a marker pulse answers (0: none)",
                 [](const R& r) { return r.sync_pulse().marker_sequence(); }),
           Int("event_source_ns", "ns", "source clock",
               "the edge on the client host's CLOCK_MONOTONIC (middle of the ioctl bracket)",
               [](const R& r) { return r.sync_pulse().event_source_ns(); }),
           DurationNs("source_uncertainty_ns", "half the width of the ioctl bracket",
                      [](const R& r) { return r.sync_pulse().source_uncertainty_ns(); }),
           SessionNs("event_session_ns", "the edge mapped to session time",
                     [](const R& r) { return r.sync_pulse().event_session_ns(); }),
           DurationNs("uncertainty_ns", "half-width of event_session_ns (clock model plus bracket)",
                      [](const R& r) { return r.sync_pulse().uncertainty_ns(); }),
           SessionNs("arrival_session_ns", "when the server received it",
                     [](const R& r) { return r.sync_pulse().arrival_session_ns(); }),
           Str("device", "the serial device", [](const R& r) { return r.sync_pulse().device(); }),
           Bool("simulated", "1: no line moved (--sync-simulate)",
                [](const R& r) { return r.sync_pulse().simulated(); }),
       })});
  t.push_back(
      {"probes.csv", R::kProbe, v1::RECORD_KIND_PROBE,
       "one row per clock probe (RFC 5905 on-wire exchange)",
       WithCommon({
           Str("client_id", "the probed client", [](const R& r) { return r.probe().client_id(); }),
           Count("probe_id", "the probe's id", [](const R& r) { return r.probe().probe_id(); }),
           SessionNs("t1_session_ns", "T1: the server sent the probe",
                     [](const R& r) { return r.probe().t1_session_ns(); }),
           Int("t2_client_ns", "ns", "client clock", "T2: the client received it",
               [](const R& r) { return r.probe().t2_client_ns(); }),
           Int("t3_client_ns", "ns", "client clock", "T3: the client replied",
               [](const R& r) { return r.probe().t3_client_ns(); }),
           SessionNs("t4_session_ns", "T4: the server received the reply",
                     [](const R& r) { return r.probe().t4_session_ns(); }),
           DurationNs("offset_ns", "client clock minus session time",
                      [](const R& r) { return r.probe().offset_ns(); }),
           DurationNs("delay_ns", "round-trip delay",
                      [](const R& r) { return r.probe().delay_ns(); }),
           Bool("accepted", "false: rejected (impossible timestamps)",
                [](const R& r) { return r.probe().accepted(); }),
           Str("reject_reason", "why it was rejected",
               [](const R& r) { return r.probe().reject_reason(); }),
           Str("transport", "empty: the client's stream; udp: the UDP probe port",
               [](const R& r) { return r.probe().transport(); }),
       })});
  t.push_back({"clock_models.csv", R::kClockModel, v1::RECORD_KIND_CLOCK_MODEL,
               "one row per update of a client's clock model "
               "(session = client - offset - drift x (client - reference))",
               WithCommon({
                   Str("client_id", "the modelled client",
                       [](const R& r) { return r.clock_model().client_id(); }),
                   DurationNs("offset_ns", "client clock minus session time at the reference",
                              [](const R& r) { return r.clock_model().offset_ns(); }),
                   Num("drift_ppm", "ppm", "the client clock's rate error",
                       [](const R& r) { return r.clock_model().drift_ppm(); }),
                   Int("reference_client_ns", "ns", "client clock",
                       "client-clock reading where offset_ns holds exactly",
                       [](const R& r) { return r.clock_model().reference_client_ns(); }),
                   DurationNs("uncertainty_ns", "half-width of a mapping at the reference",
                              [](const R& r) { return r.clock_model().uncertainty_ns(); }),
                   DurationNs("min_delay_ns", "smallest round trip seen",
                              [](const R& r) { return r.clock_model().min_delay_ns(); }),
                   Count("samples", "probes in the model",
                         [](const R& r) { return r.clock_model().samples(); }),
                   Str("reason", "why the model changed",
                       [](const R& r) { return r.clock_model().reason(); }),
                   Num("drift_error_ppm", "ppm", "bound on the drift's error",
                       [](const R& r) { return r.clock_model().drift_error_ppm(); }),
                   DurationNs("asymmetry_ns", "half the round trip the offset was read from",
                              [](const R& r) { return r.clock_model().asymmetry_ns(); }),
                   DurationNs("offset_scatter_ns", "offset error beyond the asymmetry",
                              [](const R& r) { return r.clock_model().offset_scatter_ns(); }),
                   Bool("drift_fitted", "drift_ppm is fitted (not the prior's 0)",
                        [](const R& r) { return r.clock_model().drift_fitted(); }),
               })});
  auto chosen = [](const R& r) -> const v1::CalibrationFit& {
    const auto& c = r.calibration();
    if (c.chosen() < static_cast<uint32_t>(c.fits_size())) {
      return c.fits(static_cast<int>(c.chosen()));
    }
    return v1::CalibrationFit::default_instance();
  };
  t.push_back(
      {"calibrations.csv", R::kCalibration, v1::RECORD_KIND_CALIBRATION,
       "one row per trainer calibration measured in the session",
       WithCommon({
           Str("id", "the calibration (c-...)", [](const R& r) { return r.calibration().id(); }),
           Str("trainer", "the trainer's pseudonym",
               [](const R& r) { return r.calibration().trainer(); }),
           Str("client_id", "the source client",
               [](const R& r) { return r.calibration().client_id(); }),
           Count("moves", "non-practice moves shown",
                 [](const R& r) { return r.calibration().moves(); }),
           Count("valid", "valid answers (the delays fitted)",
                 [](const R& r) { return r.calibration().valid(); }),
           Count("missed", "moves never answered",
                 [](const R& r) { return r.calibration().missed(); }),
           Str("family", "the chosen family (lowest AIC)",
               [chosen](const R& r) { return chosen(r).family(); }),
           Str("kernel", "the chosen kernel, canonical text",
               [](const R& r) { return r.calibration().kernel_description(); }),
           Num("mean_s", "s", "mean of the fitted delay distribution",
               [chosen](const R& r) { return chosen(r).mean_s(); }),
           Num("p90_s", "s", "0.9 quantile of the fitted delay distribution",
               [chosen](const R& r) { return chosen(r).p90_s(); }),
           Num("ks_distance", "", "Kolmogorov-Smirnov distance of the chosen fit",
               [chosen](const R& r) { return chosen(r).ks_distance(); }),
           Num("mean_low_s", "s", "95% bootstrap interval of the mean, low end",
               [](const R& r) { return r.calibration().mean_interval().low_s(); }),
           Num("mean_high_s", "s", "95% bootstrap interval of the mean, high end",
               [](const R& r) { return r.calibration().mean_interval().high_s(); }),
           Str("warnings", "warnings, separated by ';' (empty: none)",
               [](const R& r) {
                 std::string out;
                 for (const auto& w : r.calibration().warnings()) {
                   out += (out.empty() ? "" : "; ") + w;
                 }
                 return out;
               }),
       })});
  t.push_back({"kernels.csv", R::kKernel, v1::RECORD_KIND_KERNEL,
               "one row per delay kernel setting (trainer empty: the session default)",
               WithCommon({
                   Str("trainer", "the trainer's pseudonym; empty: the session default",
                       [](const R& r) { return r.kernel().trainer(); }),
                   Str("kernel", "the kernel, canonical text",
                       [](const R& r) { return r.kernel().description(); }),
                   Num("weight", "", "the trainer's weight",
                       [](const R& r) { return r.kernel().weight(); }),
                   Str("author", "who set it", [](const R& r) { return r.kernel().author(); }),
                   DurationNs("allowed_lateness_ns", "session default only: allowed lateness",
                              [](const R& r) { return r.kernel().allowed_lateness_ns(); }),
                   Str("calibration", "the calibration it came from (empty: none)",
                       [](const R& r) { return r.kernel().calibration(); }),
               })});
  return t;
}

}  // namespace

const std::vector<CsvTable>& CsvTables() {
  static const std::vector<CsvTable>* tables = new std::vector<CsvTable>(MakeTables());
  return *tables;
}

const CsvTable* CsvTableFor(const tickmark::v1::Record& record) {
  for (const CsvTable& t : CsvTables()) {
    if (t.body == record.body_case()) return &t;
  }
  return nullptr;
}

std::string CsvField(const std::string& text) {
  // RFC 4180 §2 (6)-(7): fields with commas, quotes or line breaks are
  // enclosed in double quotes, and a quote inside is doubled.
  if (text.find_first_of(",\"\r\n") == std::string::npos) return text;
  std::string out = "\"";
  for (char c : text) {
    if (c == '"') out += '"';
    out += c;
  }
  out += '"';
  return out;
}

std::string CsvRow(const std::vector<std::string>& fields) {
  std::string out;
  for (size_t i = 0; i < fields.size(); ++i) {
    if (i > 0) out += ',';
    out += CsvField(fields[i]);
  }
  out += "\r\n";  // RFC 4180 §2 (1): CRLF line breaks
  return out;
}

std::string CsvHeader(const CsvTable& table) {
  std::vector<std::string> names;
  for (const CsvColumn& c : table.columns) names.push_back(c.name);
  return CsvRow(names);
}

std::string CsvRecordRow(const CsvTable& table, const tickmark::v1::Record& record) {
  std::vector<std::string> fields;
  for (const CsvColumn& c : table.columns) fields.push_back(c.value(record));
  return CsvRow(fields);
}

std::string CsvCodebook() {
  std::string out = CsvRow({"file", "column", "type", "unit", "clock", "meaning"});
  for (const CsvTable& t : CsvTables()) {
    for (const CsvColumn& c : t.columns) {
      out += CsvRow({t.file, c.name, c.type, c.unit, c.clock, c.meaning});
    }
  }
  return out;
}

}  // namespace tickmark::cli

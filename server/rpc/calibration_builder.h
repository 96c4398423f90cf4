// Turns one calibration run's events into a Calibration record body: the
// matching rule (server/core/calibration_match.h) on the source's clock,
// then the delay fit (server/core/delay_fit.h) of the valid delays, with
// every family's fit, the chosen kernel, intervals and warnings
// (docs/architecture.md, "Calibration").
//
// Pure function of its input (no I/O, no clocks): the live service reads the
// events from the ledger and appends the result. Thread-safe.
#ifndef TICKMARK_SERVER_RPC_CALIBRATION_BUILDER_H_
#define TICKMARK_SERVER_RPC_CALIBRATION_BUILDER_H_

#include <cstdint>
#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::rpc {

struct CalibrationRequest {
  std::string id;  // "c-" + 8 hex digits, chosen by the caller
  std::string trainer;
  std::string client_id;
  uint64_t client_sequence = 0;  // of the finish message
  std::string run;
  tickmark::v1::SourceKind source_kind = tickmark::v1::SOURCE_KIND_UNSPECIFIED;
  std::string source_description;
  uint32_t min_answers = 0;  // 0: 40
  std::string display_note;
  int bootstrap_resamples = 1000;  // 0: no intervals
};

// Valid answers below which no kernel is fitted.
inline constexpr size_t kMinFittedAnswers = 3;
// Valid answers wanted when the finish names none.
inline constexpr uint32_t kDefaultMinAnswers = 40;

// The bootstrap seed of a run: FNV-1a (64 bit) of "client_id/run", so the
// same run always gives the same intervals.
uint64_t CalibrationSeed(const std::string& client_id, const std::string& run);

// `events`: the run's CalibrationEvent records (with their sequences), in
// any order. FAILED_PRECONDITION (nothing to store) with fewer than
// kMinFittedAnswers valid answers or when no family fits.
absl::StatusOr<tickmark::v1::Calibration> BuildCalibration(
    const std::vector<tickmark::v1::Record>& events, const CalibrationRequest& request);

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_CALIBRATION_BUILDER_H_

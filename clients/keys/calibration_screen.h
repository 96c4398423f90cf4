// What tickmark-keys --calibrate shows (clients/common/calibration_task.h):
// the instructions, the mover's track, the live status line and the fitted
// result. Formatting only, no I/O, so tests check the text. Plain ASCII and
// ANSI erase-line; fits an 80-column terminal. Thread-compatible.
//
// The track (21 cells of 3 columns between bars, the move's label after):
//   |  -  -  -  -  - [O] -  -  -  ...  -  |  move 12
// A new move redraws it with the marker two cells left or right.
#ifndef TICKMARK_CLIENTS_KEYS_CALIBRATION_SCREEN_H_
#define TICKMARK_CLIENTS_KEYS_CALIBRATION_SCREEN_H_

#include <cstddef>
#include <string>

#include "clients/common/calibration_task.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::keys {

// The track line with the marker on `cell` and the label ("move 12",
// "practice 2/5"), no escape sequences.
std::string FormatTrack(uint32_t cells, uint32_t cell, const std::string& label);
// The label of a move: "practice 2/5" or "move 12".
std::string MoveLabel(const client::CalibrationMoveView& move, uint32_t practice_total);

// "valid 5/40 | wrong 1 missed 2 double 0 late 0 | move 9/120 | last: valid 0.52 s",
// cut to `width` columns (0: no limit). In the practice block:
// "PRACTICE 2/5 (not measured) | last: ...".
std::string FormatCalibrationStatus(const client::CalibrationProgress& p, size_t width);

// The instructions shown before the start: the task, the rule, the inputs,
// the blocks, and how to start and stop. Lines end in "\r\n" (cbreak mode
// keeps output processing, but this is safe either way).
std::string CalibrationInstructions(const client::CalibrationTask& task,
                                    const std::string& approve_inputs,
                                    const std::string& disapprove_inputs,
                                    const std::string& quit_inputs);

// The result printed at the end: counts, every family's fit (kernel text,
// AIC, KS), the chosen kernel, the bootstrap intervals, warnings, the
// display note and the id, and how to plot it.
std::string FormatCalibrationResult(const tickmark::v1::Calibration& c);

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_CALIBRATION_SCREEN_H_

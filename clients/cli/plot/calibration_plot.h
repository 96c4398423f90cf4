// The picture of a calibration (`tickmark calibrate show --plot`): the
// histogram of the valid delays, scaled as a density, with the density of
// every fitted family drawn over it (the chosen one thick), axes with tick
// labels in seconds, and a legend.
//
// Densities come from the kernels' CDFs (server/core/delay_kernel.h, the
// uncut Cdf) by central differences; each fit's kernel is read back from its
// canonical text (CalibrationFit.kernel_description).
//
// Pure apart from the result; thread-safe.
#ifndef TICKMARK_CLIENTS_CLI_PLOT_CALIBRATION_PLOT_H_
#define TICKMARK_CLIENTS_CLI_PLOT_CALIBRATION_PLOT_H_

#include <string>

#include "clients/cli/plot/canvas.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::cli::plot {

inline constexpr int kPlotWidth = 900;
inline constexpr int kPlotHeight = 560;

// The colour of the fit at index `i` of Calibration.fits (a fixed palette,
// repeated after its end). Tests look for these pixels.
Rgb FitColour(int i);

// Draws the picture. Returns the canvas; *error (if given) gets a note when
// there is nothing to draw (no valid delays): the canvas then only says so.
Canvas DrawCalibration(const tickmark::v1::Calibration& calibration, std::string* error = nullptr);

}  // namespace tickmark::cli::plot

#endif  // TICKMARK_CLIENTS_CLI_PLOT_CALIBRATION_PLOT_H_

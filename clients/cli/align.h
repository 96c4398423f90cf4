// Pulse alignment (tickmark align; docs/sync.md, "Aligning"): pairs a
// session's sync pulse times with another recorder's pulse times and fits
// the linear map other = a + b · session by least squares.
//
// The other recorder may have missed pulses or recorded extra ones, and its
// clock has any offset and a small rate error. The method:
//  1. Hypotheses. For a few anchor pulses spread over the session, every
//     other-recorder pulse j proposes the offset d = other_j − session_i;
//     it scores the pulses near the anchor (±kLocal pulses) that then land
//     within the tolerance of some other pulse. The best score wins; the
//     best score of the same anchor at an offset more than two tolerances
//     away is the runner-up. A jittered pulse train (tickmark-serial draws
//     every gap at random) has no period, so a wrong offset scores little.
//  2. Growth. From the winner (b = 1), the span around the anchor doubles
//     each round: every session pulse in it is paired with the nearest
//     other pulse within the tolerance of a + b · session (each other pulse
//     used once, the closer pair kept), and a, b are refitted, so drift is
//     followed as the span grows.
//  3. Trim. Pairs whose residual exceeds 5 robust standard deviations
//     (1.4826 × median absolute residual; at least the tolerance / 100)
//     are dropped and the line is refitted once.
// It refuses when fewer than min_pairs pulses pair up, when the winner
// pairs fewer than half the pulses near its anchor, or when the
// runner-up scores at least `ambiguity` of the winner (a regular train
// whose pulses cannot be told apart).
#ifndef TICKMARK_CLIENTS_CLI_ALIGN_H_
#define TICKMARK_CLIENTS_CLI_ALIGN_H_

#include <cstddef>
#include <string>
#include <vector>

#include "absl/status/statusor.h"

namespace tickmark::cli {

struct AlignOptions {
  double tolerance_s = 0.05;  // how far a pulse may land from its partner
  size_t min_pairs = 8;
  double ambiguity = 0.8;
};

struct AlignPair {
  size_t session_index = 0;  // into the session times given
  size_t other_index = 0;    // into the other times given
  double session_s = 0;
  double other_s = 0;
  double residual_s = 0;  // other − (a + b · session)
};

struct AlignResult {
  double a = 0;  // other = a + b · session (seconds)
  double b = 1;
  double a_se = 0;  // standard errors of the fit (ordinary least squares)
  double b_se = 0;
  double drift_ppm() const { return (b - 1.0) * 1e6; }
  double rms_s = 0;
  double max_abs_s = 0;
  std::vector<AlignPair> pairs;  // in session order
  size_t trimmed = 0;            // pairs dropped as outliers
  size_t best_score = 0;         // step 1's winner and runner-up
  size_t runner_up_score = 0;
};

// session_s and other_s: pulse times in seconds, each on its own clock
// (any order; they are sorted). The session times should be relative to a
// nearby origin (e.g. the session's opening) to keep double precision.
absl::StatusOr<AlignResult> AlignPulses(const std::vector<double>& session_s,
                                        const std::vector<double>& other_s,
                                        const AlignOptions& options);

// Least squares line y = a + b · x (centred sums); false for fewer than two
// distinct x.
bool FitLine(const std::vector<double>& x, const std::vector<double>& y, double* a, double* b,
             double* a_se, double* b_se);

// Reads one column of numbers from CSV text: `column` is a header name, a
// 1-based column number, or empty for the first column. A first row whose
// cell is not a number is the header. Blank lines and lines starting with
// '#' are skipped; any other row without a number in the column is an error
// naming its line.
absl::StatusOr<std::vector<double>> ReadCsvColumn(const std::string& text,
                                                  const std::string& column,
                                                  const std::string& source_name);

}  // namespace tickmark::cli

#endif  // TICKMARK_CLIENTS_CLI_ALIGN_H_

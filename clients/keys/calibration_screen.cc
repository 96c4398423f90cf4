#include "clients/keys/calibration_screen.h"

#include <cstdio>

#include "absl/strings/str_cat.h"

namespace tickmark::keys {
namespace {

std::string Fixed(double v, int digits) {
  char buf[64];
  std::snprintf(buf, sizeof buf, "%.*f", digits, v);
  return buf;
}

std::string Cut(std::string s, size_t width) {
  if (width > 0 && s.size() > width) s.resize(width);
  return s;
}

// A histogram kernel's text runs to thousands of characters: cut it (the
// full text is in the record; `tickmark calibrate show` prints it).
std::string KernelText(const std::string& text) {
  constexpr size_t kMax = 160;
  if (text.size() <= kMax) return text;
  return absl::StrCat(text.substr(0, kMax), "... (", text.size(), " characters)");
}

}  // namespace

std::string FormatTrack(uint32_t cells, uint32_t cell, const std::string& label) {
  std::string out = "|";
  for (uint32_t i = 0; i < cells; ++i) out += i == cell ? "[O]" : " - ";
  out += "|  " + label;
  return out;
}

std::string MoveLabel(const client::CalibrationMoveView& move, uint32_t practice_total) {
  if (move.practice) return absl::StrCat("practice ", move.index, "/", practice_total);
  return absl::StrCat("move ", move.index);
}

std::string FormatCalibrationStatus(const client::CalibrationProgress& p, size_t width) {
  std::string s;
  if (p.in_practice) {
    s = absl::StrCat("PRACTICE ", p.practice_shown, "/", p.practice_total, " (not measured)");
  } else {
    s = absl::StrCat("valid ", p.valid, "/", p.wanted, " | wrong ", p.wrong_sign, " missed ",
                     p.missed, " double ", p.double_answers, " late ", p.stray, " | move ", p.moves,
                     "/", p.max_moves);
  }
  if (!p.last.empty()) s += " | last: " + p.last;
  return Cut(s, width);
}

std::string CalibrationInstructions(const client::CalibrationTask& task,
                                    const std::string& approve_inputs,
                                    const std::string& disapprove_inputs,
                                    const std::string& quit_inputs) {
  const client::CalibrationTaskOptions& o = task.options();
  std::string s;
  s += "CALIBRATION: measures how long you take to judge and answer (your\r\n";
  s += "evaluative delay), so that your feedback is credited to the right steps.\r\n\r\n";
  s += "A marker [O] on a track jumps left or right at random times. The rule:\r\n\r\n";
  s += "    " + task.RuleText() + "\r\n\r\n";
  s += "    approve:    " + approve_inputs + "\r\n";
  s += "    disapprove: " + disapprove_inputs + "\r\n";
  s += "    stop early: " + quit_inputs + " (what was measured is still used)\r\n\r\n";
  s += "Answer every move once, as soon as you have judged it; do not guess ahead.\r\n";
  s += absl::StrCat("First ", o.practice, " practice moves (not measured), then moves until ",
                    o.answers, " valid answers\r\n(at most ", task.max_moves(),
                    " moves; moves come every ", Fixed(o.min_interval_s, 1), " to ",
                    Fixed(o.max_interval_s, 1), " s).\r\n\r\n");
  s += "Take a comfortable position; stop if you feel unwell.\r\n\r\n";
  s += "Press space (or any other key) to start.\r\n";
  return s;
}

std::string FormatCalibrationResult(const tickmark::v1::Calibration& c) {
  std::string s;
  s += absl::StrCat("Calibration ", c.id(), " stored for trainer ", c.trainer(), " (run ", c.run(),
                    ")\n");
  s += absl::StrCat("  moves ", c.moves(), "  valid ", c.valid(), " (wanted ", c.min_answers(),
                    ")  wrong sign ", c.wrong_sign(), "  missed ", c.missed(), "  double ",
                    c.double_answers(), "  late/stray ", c.stray(), "  practice answers ",
                    c.practice_answers(), "\n");
  s += "  fits (lowest AIC chosen, *):\n";
  for (int i = 0; i < c.fits_size(); ++i) {
    const tickmark::v1::CalibrationFit& f = c.fits(i);
    const bool chosen = static_cast<uint32_t>(i) == c.chosen() && f.error().empty();
    s += absl::StrCat("  ", chosen ? "* " : "  ", f.family(), " (k=", f.parameters(), ")");
    if (!f.error().empty()) {
      s += ": no fit: " + f.error() + "\n";
      continue;
    }
    s += absl::StrCat(": AIC ", Fixed(f.aic(), 2), "  KS ", Fixed(f.ks_distance(), 3), "  mean ",
                      Fixed(f.mean_s(), 3), " s  p90 ", Fixed(f.p90_s(), 3), " s\n");
    s += "        " + KernelText(f.kernel_description()) + "\n";
  }
  s += "  chosen kernel: " + KernelText(c.kernel_description()) + "\n";
  if (c.has_mean_interval()) {
    s += absl::StrCat("  mean 95% bootstrap interval: ", Fixed(c.mean_interval().low_s(), 3),
                      " .. ", Fixed(c.mean_interval().high_s(), 3), " s\n");
  }
  if (c.has_p90_interval()) {
    s += absl::StrCat("  p90  95% bootstrap interval: ", Fixed(c.p90_interval().low_s(), 3), " .. ",
                      Fixed(c.p90_interval().high_s(), 3), " s\n");
  }
  for (const std::string& w : c.warnings()) s += "  warning: " + w + "\n";
  if (!c.display_note().empty()) s += "  note: " + c.display_note() + "\n";
  s += absl::StrCat("Plot it: tickmark calibrate show ", c.id(), " --plot fit.png\n");
  return s;
}

}  // namespace tickmark::keys

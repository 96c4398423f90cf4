#include "clients/keys/calibration_flags.h"

namespace tickmark::keys {

CLI::Option* AddCalibrationFlags(CLI::App& app, CalibrationFlags* f) {
  const std::string cal = "Calibration (measure your evaluative delay; see below)";
  CLI::Option* calibrate =
      app.add_flag("--calibrate", f->calibrate,
                   "run the calibration task instead of sending feedback, then print the fit")
          ->group(cal);
  app.add_option("--answers", f->answers, "valid answers wanted (3..1000)")
      ->capture_default_str()
      ->needs(calibrate)
      ->group(cal);
  app.add_option("--practice", f->practice, "practice moves first, not measured")
      ->capture_default_str()
      ->needs(calibrate)
      ->group(cal);
  app.add_option("--min-interval", f->min_interval_s, "shortest time between moves, seconds")
      ->capture_default_str()
      ->needs(calibrate)
      ->group(cal);
  app.add_option("--max-interval", f->max_interval_s, "longest time between moves, seconds")
      ->capture_default_str()
      ->needs(calibrate)
      ->group(cal);
  app.add_option("--max-moves", f->max_moves,
                 "stop after this many measured moves (0: 3 x --answers)")
      ->capture_default_str()
      ->needs(calibrate)
      ->group(cal);
  app.add_option("--rule", f->rule, "the direction to approve")
      ->check(CLI::IsMember({"right", "left"}))
      ->capture_default_str()
      ->needs(calibrate)
      ->group(cal);
  app.add_option("--seed", f->seed, "schedule seed (0: random)")->needs(calibrate)->group(cal);
  app.add_option("--run", f->run, "run id (default: a fresh cal-XXXXXXXXXXXX)")
      ->type_name("ID")
      ->needs(calibrate)
      ->group(cal);
  app.add_option("--result-timeout", f->result_timeout_s,
                 "seconds to wait for the server's fit after the last move")
      ->capture_default_str()
      ->check(CLI::PositiveNumber)
      ->needs(calibrate)
      ->group(cal);
  return calibrate;
}

std::string CalibrationHelp(const std::string& inputs, const std::string& example) {
  return R"(Calibration (--calibrate): measures your evaluative delay, the time from
seeing something to having judged it and acted, so that your feedback is
credited to the agent steps you actually judged. A marker on a track in
the terminal jumps left or right at random intervals (--min-interval to
--max-interval seconds apart); a rule is shown ("approve moves to the RIGHT,
disapprove moves to the LEFT"); you answer every move with your usual
approve and disapprove )" +
         inputs + R"(.
First --practice moves (not measured), then moves until --answers valid
answers (at most --max-moves moves), or until you press q / Ctrl-C (what was
measured is still fitted). Each move and answer is sent
as it happens; at the end the server fits delay kernels (gamma, shifted
gamma, lognormal, ex-Gaussian, ...), stores the calibration for your trainer
pseudonym (applied when you join a session that does not pin its kernels),
and the result is printed: counts, each fit (kernel, AIC, KS distance), the
chosen kernel, its bootstrap intervals and the calibration id. Move times are
read right after the terminal write returns, so the display latency
(terminal emulator and monitor refresh, typically one to a few frames, about
10-50 ms) is part of every measured delay; the result notes this.
Exit status 0 when the calibration was stored, 1 when none was (e.g. too few
valid answers).
Example: )" +
         example + "\n";
}

}  // namespace tickmark::keys

// The --calibrate flags every terminal-display source shares (tickmark-keys,
// tickmark-serial) and their --help paragraph (CLI11). Parsing only.
#ifndef TICKMARK_CLIENTS_KEYS_CALIBRATION_FLAGS_H_
#define TICKMARK_CLIENTS_KEYS_CALIBRATION_FLAGS_H_

#include <cstdint>
#include <string>

#include "server/base/flags.h"

namespace tickmark::keys {

struct CalibrationFlags {
  bool calibrate = false;
  uint32_t answers = 40;
  uint32_t practice = 5;
  double min_interval_s = 0.8;
  double max_interval_s = 3.0;
  uint32_t max_moves = 0;  // 0: 3 x answers
  uint64_t seed = 0;       // 0: a random seed
  std::string rule = "right";
  std::string run;  // empty: a fresh run id
  double result_timeout_s = 60.0;
};

// Adds --calibrate and the options that need it; returns --calibrate.
CLI::Option* AddCalibrationFlags(CLI::App& app, CalibrationFlags* f);

// The --help paragraph on the task; `inputs` ("keys", "box buttons") names
// what the trainer uses; `example` is a command line.
std::string CalibrationHelp(const std::string& inputs, const std::string& example);

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_CALIBRATION_FLAGS_H_

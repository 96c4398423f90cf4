// Command-line flags of tickmark-keys, and its --help text (CLI11, with the
// connection flags every client shares).
// Parsing only; no I/O. Thread-compatible.
#ifndef TICKMARK_CLIENTS_KEYS_KEYS_FLAGS_H_
#define TICKMARK_CLIENTS_KEYS_KEYS_FLAGS_H_

#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "clients/common/connection_flags.h"
#include "clients/keys/calibration_flags.h"

namespace tickmark::keys {

struct KeysFlags {
  client::ConnectionFlags connection;  // --server, --token-file, ... (shared)
  std::string profile;
  bool stdin_lines = false;
  double flush_timeout_s = 10.0;
  bool quiet = false;
  bool help = false;  // --help was given: print KeysUsage and exit
  std::string version;  // --version was given: print this and exit
  // Input devices (evdev).
  std::string device;                    // --device PATH|NAME|VENDOR:PRODUCT
  std::string input_dir = "/dev/input";  // --input-dir: where names are looked up
  bool list_devices = false;
  bool grab = false;
  bool verbose = false;
  // --calibrate and its options (calibration_flags.h).
  CalibrationFlags calibration;
};

// INVALID_ARGUMENT naming the flag for unknown flags, missing or bad values.
absl::StatusOr<KeysFlags> ParseKeysFlags(const std::vector<std::string>& args);

// The --help text; `legend` lists the default key bindings.
std::string KeysUsage(const std::string& legend);

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_KEYS_FLAGS_H_

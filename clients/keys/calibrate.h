// --calibrate of the terminal-display sources (tickmark-keys,
// tickmark-serial): runs the calibration task
// (clients/common/calibration_task.h) in the terminal. The mover is drawn on
// stdout with plain ANSI (calibration_screen.h); answers come from the
// terminal keys through the key map, or from other inputs (ExternalAnswers:
// an input device's buttons stamped with the kernel's time, a serial box);
// the terminal keys then only start and stop. Moves and answers go out on the trainer stream as
// they happen; at the end the finish is sent and the server's fitted
// Calibration printed.
//
// Needs a terminal on stdin and stdout. The caller blocks the terminal
// signals (BlockTerminalSignals) before any thread starts.
#ifndef TICKMARK_CLIENTS_KEYS_CALIBRATE_H_
#define TICKMARK_CLIENTS_KEYS_CALIBRATE_H_

#include <memory>
#include <string>

#include "clients/common/calibration_task.h"
#include "clients/common/stream_client.h"
#include "clients/keys/button_map.h"
#include "clients/keys/calibration_flags.h"
#include "clients/keys/evdev.h"
#include "clients/keys/key_map.h"

namespace tickmark::keys {

// Answers from something other than the terminal keys.
class ExternalAnswers {
 public:
  virtual ~ExternalAnswers() = default;
  // Waits up to timeout_ms for input, returning early when `also_fd` is
  // readable (stdin), and returns the answers (event times on the client's
  // clock) and whether a quit button was pressed.
  virtual client::CalibrationInput Poll(int timeout_ms, int also_fd) = 0;
  // For the instructions: "/dev/input/event5 \"Clicker\"".
  virtual std::string Describe() const = 0;
  // The inputs that approve, disapprove ("KEY_PAGEDOWN, KEY_RIGHT").
  virtual std::string ApproveInputs() const = 0;
  virtual std::string DisapproveInputs() const = 0;
  // A note for the status line ("device gone"), empty when all is well.
  virtual std::string Note() const { return ""; }
};

// An input device's buttons through a button map (tickmark-keys --device).
// Open()s the device; the error if it cannot.
absl::StatusOr<std::unique_ptr<ExternalAnswers>> DeviceAnswers(EvdevDevice::Options options,
                                                               const ButtonMap* map);

// The inputs of a map that approve (sign > 0) or disapprove (sign < 0):
// "f, +"; "(none bound)" when there are none.
std::string InputsWithSign(const std::map<std::string, Binding>& bindings, int sign);

// Returns the exit status: 0 when the server stored a calibration, 1 when
// it did not (too few answers, rejected, not reached), 2 for bad flags.
// `external`: the answers' source when not the terminal keys, else null.
int RunCalibration(client::TrainerClient& client, client::StreamOptions options,
                   const CalibrationFlags& flags, KeyMap keymap, ExternalAnswers* external);

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_CALIBRATE_H_

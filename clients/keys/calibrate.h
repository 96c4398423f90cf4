// tickmark-keys --calibrate: runs the calibration task
// (clients/common/calibration_task.h) in the terminal. The mover is drawn on
// stdout with plain ANSI (calibration_screen.h); answers come from the
// terminal keys through the key map, or, with --device, from the input
// device's buttons (stamped with the kernel's time; the terminal keys then
// only start and stop). Moves and answers go out on the trainer stream as
// they happen; at the end the finish is sent and the server's fitted
// Calibration printed.
//
// Needs a terminal on stdin and stdout. The caller blocks the terminal
// signals (BlockTerminalSignals) before any thread starts.
#ifndef TICKMARK_CLIENTS_KEYS_CALIBRATE_H_
#define TICKMARK_CLIENTS_KEYS_CALIBRATE_H_

#include "clients/common/stream_client.h"
#include "clients/keys/button_map.h"
#include "clients/keys/key_map.h"
#include "clients/keys/keys_flags.h"

namespace tickmark::keys {

// Returns the exit status: 0 when the server stored a calibration, 1 when
// it did not (too few answers, rejected, not reached), 2 for bad flags.
// `buttons` is the device's button map when flags.device is set, else null.
int RunCalibration(client::TrainerClient& client, client::StreamOptions options,
                   const KeysFlags& flags, KeyMap keymap, const ButtonMap* buttons);

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_CALIBRATE_H_

#include "clients/keys/keys_flags.h"

#include "server/base/flags.h"

namespace tickmark::keys {
namespace {

constexpr char kDescription[] =
    "tickmark-keys: send approve/disapprove feedback from terminal keys to a\n"
    "tickmark session (a trainer source).";

std::string Footer(const std::string& legend) {
  std::string text = "Default keys: " + legend +
         R"(
Ctrl-C quits too; Ctrl-Z suspends (the terminal is restored meanwhile).

--client-id defaults to <installation id>:tickmark-keys:<tty> (a random id kept in
~/.local/state/tickmark/installation-id), or ...:stdin with
--stdin-lines, or ...:<device> with --device.

Input devices (--device): a path (/dev/input/event5), a vendor:product id in
hex (046d:c52b) or a name (exact, or a unique part). Needs read access (the
input group, or a udev rule). Presses are stamped with the kernel's timestamp
on CLOCK_MONOTONIC. Unplugging is survived: the same device is reopened when
it comes back. Use a device profile: clients/keys/profiles/{clicker,
foot-pedal,gamepad,numpad}.toml (buttons = kernel key names).

Timing: each key press is stamped with CLOCK_MONOTONIC right after read()
returns its byte; the server maps that clock to session time by probing it.
Terminals deliver no kernel timestamp, so terminal scheduling and key
autorepeat add error; use an input-device source for precise timing.

%CALIBRATION%
Exit status: 0 when everything sent was acknowledged; 1 when something stayed
unacknowledged, was rejected, an input line was bad, or the server refused
the connection; 2 for usage and configuration errors.

tickmark is not a safety system: a robot trained with it needs an
independent emergency stop. Studies with people need ethics-board approval.
)";
  const std::string mark = "%CALIBRATION%\n";
  text.replace(text.find(mark), mark.size(),
               CalibrationHelp("keys (or, with --device, buttons)",
                               "tickmark-keys --server HOST:7461 --token-file trainer.token "
                               "--calibrate") +
                   "\n");
  return text;
}

void Define(CLI::App& app, KeysFlags* f, const std::string& legend) {
  ConfigureApp(app, Footer(legend));
  client::AddConnectionFlags(app, &f->connection);
  const std::string input = "Input";
  app.add_option("--profile", f->profile,
                 "key bindings from a TOML profile (see clients/keys/profiles/terminal.toml); "
                 "replaces the defaults")
      ->type_name("FILE")
      ->group(input);
  CLI::Option* lines = app.add_flag("--stdin-lines", f->stdin_lines,
                                    "no terminal: read lines \"+1\", \"-1 key:j\", \"0.5\" from "
                                    "stdin, each stamped when read; one line per acknowledgement; "
                                    "exit after end of input once all are acknowledged")
                           ->group(input);
  client::AddFlushTimeoutFlag(app, &f->flush_timeout_s)->group(input);
  app.add_flag("--quiet", f->quiet, "no per-acknowledgement lines with --stdin-lines")
      ->group(input);
  const std::string devices = "Input devices (Linux evdev: clickers, foot pedals, keypads, gamepads)";
  app.add_flag("--list-devices", f->list_devices,
               "list /dev/input/event* with name, vendor:product id and keys, then exit")
      ->group(devices);
  CLI::Option* device =
      app.add_option("--device", f->device,
                     "read this input device instead of the terminal: a path, VENDOR:PRODUCT "
                     "in hex, or a name (see below)")
          ->type_name("D")
          ->group(devices);
  app.add_flag("--grab", f->grab, "exclusive access: presses do not also reach the desktop")
      ->needs(device)
      ->group(devices);
  app.add_option("--input-dir", f->input_dir, "where names and ids are looked up")
      ->type_name("DIR")
      ->group(devices);
  app.add_flag("--verbose", f->verbose,
               "more detail; at exit, the timing report (event time vs the time the program "
               "read the event)")
      ->group(devices);
  lines->excludes(device);

  AddCalibrationFlags(app, &f->calibration)->excludes(lines);
}

}  // namespace

absl::StatusOr<KeysFlags> ParseKeysFlags(const std::vector<std::string>& args) {
  KeysFlags f;
  CLI::App app(kDescription, "tickmark-keys");
  Define(app, &f, "");
  std::string text;
  switch (ParseArgs(app, args, &text)) {
    case ParseResult::kRun:
      return f;
    case ParseResult::kHelp:
      if (text == VersionLine(app.get_name()) + "\n") {
        f.version = text;
      } else {
        f.help = true;
      }
      return f;
    case ParseResult::kError:
      break;
  }
  return absl::InvalidArgumentError(text);
}

std::string KeysUsage(const std::string& legend) {
  KeysFlags f;
  CLI::App app(kDescription, "tickmark-keys");
  Define(app, &f, legend);
  return app.help();
}

}  // namespace tickmark::keys

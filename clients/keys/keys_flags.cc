#include "clients/keys/keys_flags.h"

#include <cmath>
#include <cstdlib>
#include <functional>
#include <map>

namespace tickmark::keys {

absl::StatusOr<KeysFlags> ParseKeysFlags(const std::vector<std::string>& args) {
  KeysFlags f;
  const std::map<std::string, std::string*> strings = {
      {"--server", &f.server},       {"--token-file", &f.token_file},
      {"--token", &f.token},         {"--client-id", &f.client_id},
      {"--profile", &f.profile},     {"--ca-file", &f.ca_file},
      {"--device", &f.device},       {"--input-dir", &f.input_dir}};
  const std::map<std::string, bool*> bools = {
      {"--stdin-lines", &f.stdin_lines}, {"--insecure", &f.insecure},
      {"--quiet", &f.quiet},             {"--help", &f.help},
      {"-h", &f.help},                   {"--list-devices", &f.list_devices},
      {"--grab", &f.grab},               {"--verbose", &f.verbose}};
  for (size_t i = 0; i < args.size(); ++i) {
    std::string name = args[i];
    std::string value;
    bool has_value = false;
    if (size_t eq = name.find('='); eq != std::string::npos && name.rfind("--", 0) == 0) {
      value = name.substr(eq + 1);
      name = name.substr(0, eq);
      has_value = true;
    }
    auto take_value = [&]() -> absl::StatusOr<std::string> {
      if (has_value) return value;
      if (i + 1 >= args.size()) {
        return absl::InvalidArgumentError(name + " needs a value");
      }
      return args[++i];
    };
    if (auto it = bools.find(name); it != bools.end()) {
      if (has_value) return absl::InvalidArgumentError(name + " takes no value");
      *it->second = true;
    } else if (auto st = strings.find(name); st != strings.end()) {
      absl::StatusOr<std::string> v = take_value();
      if (!v.ok()) return v.status();
      if (v->empty()) return absl::InvalidArgumentError(name + " needs a non-empty value");
      *st->second = *v;
    } else if (name == "--flush-timeout") {
      absl::StatusOr<std::string> v = take_value();
      if (!v.ok()) return v.status();
      char* end = nullptr;
      const double s = std::strtod(v->c_str(), &end);
      if (v->empty() || *end != '\0' || !std::isfinite(s) || s < 0) {
        return absl::InvalidArgumentError("--flush-timeout needs seconds >= 0, got \"" + *v + "\"");
      }
      f.flush_timeout_s = s;
    } else {
      return absl::InvalidArgumentError("unknown argument \"" + args[i] + "\" (see --help)");
    }
  }
  if (f.grab && f.device.empty()) {
    return absl::InvalidArgumentError("--grab needs --device");
  }
  if (f.stdin_lines && !f.device.empty()) {
    return absl::InvalidArgumentError("--stdin-lines and --device exclude each other");
  }
  return f;
}

std::string KeysUsage(const std::string& legend) {
  return std::string(
R"usage(tickmark-keys: send approve/disapprove feedback from terminal keys to a
tickmark session (a trainer source).

Usage: tickmark-keys [flags]

Connection
  --server HOST:PORT   tickmarkd address (default )usage") + kDefaultServer + R"usage()
  --token-file PATH    file holding your trainer token (recommended); else
                       the environment variable TICKMARK_TOKEN is used.
  --token TOKEN        accepted, with a warning: argv is visible in ps.
  --client-id ID       stable id of this source (letters, digits - _ . :,
                       at most 64). Default: host:user:tickmark-keys:<tty>,
                       or ...:stdin with --stdin-lines. Two instances running
                       at once must not share an id.
  --ca-file PATH       use TLS, trusting the CA certificates in PATH.
  --insecure           allow plaintext to a non-loopback host. Plaintext is
                       used on loopback by default; other hosts get TLS with
                       the system's trusted roots.

Input
  --profile FILE       key bindings from a TOML profile (see
                       clients/keys/profiles/terminal.toml); replaces the
                       defaults.
  --stdin-lines        no terminal: read lines "+1", "-1 key:j", "0.5" from
                       stdin, each stamped when read; print one line per
                       acknowledgement; exit after end of input once all are
                       acknowledged or --flush-timeout passed.
  --flush-timeout S    seconds to wait for acknowledgements at exit
                       (default 10).
  --quiet              no per-acknowledgement lines with --stdin-lines.

Input devices (Linux evdev: clickers, foot pedals, keypads, gamepads)
  --list-devices       list /dev/input/event* with name, vendor:product id
                       and the keys each can send, then exit.
  --device D           read device D instead of the terminal: a path
                       (/dev/input/event5), a vendor:product id in hex
                       (046d:c52b) or a name (exact, or a unique part).
                       Needs read access (the input group, or a udev rule).
                       Presses are stamped with the kernel's timestamp on
                       CLOCK_MONOTONIC. Unplugging is survived: the same
                       device is reopened when it comes back. Use a device
                       profile: clients/keys/profiles/{clicker,foot-pedal,
                       gamepad,numpad}.toml (buttons = kernel key names).
  --grab               exclusive access: presses do not also reach the desktop.
  --input-dir DIR      where names and ids are looked up (default /dev/input).
  --verbose            more detail; at exit, the timing report (event time
                       vs the time the program read the event).
  --help               this text.

Default keys: )usage" + legend + R"usage(
Ctrl-C quits too; Ctrl-Z suspends (the terminal is restored meanwhile).

Timing: each key press is stamped with CLOCK_MONOTONIC right after read()
returns its byte; the server maps that clock to session time by probing it.
Terminals deliver no kernel timestamp, so terminal scheduling and key
autorepeat add error; use an input-device source for precise timing.

Exit status: 0 when everything sent was acknowledged; 1 when something stayed
unacknowledged, was rejected, an input line was bad, or the server refused
the connection; 2 for usage and configuration errors.

tickmark is not a safety system: a robot trained with it needs an
independent emergency stop. Studies with people need ethics-board approval.
)usage";
}

}  // namespace tickmark::keys

// ButtonMap: which button of a device sends which feedback — the profiles of
// tickmark-keys --device (evdev key codes) and tickmark-serial (button names
// of a response box, or byte values).
//
//   name = "clicker"
//   [[binding]]
//   buttons = ["KEY_PAGEDOWN", "KEY_RIGHT"]
//   value = 1.0                 # in [-1000, 1000], records.proto Feedback.value
//   label = "approve"
//   [[binding]]
//   buttons = ["KEY_ESC"]
//   action = "quit"
//
// Button names are checked and made canonical by the Namer the caller gives:
// evdev accepts "KEY_PAGEUP", "BTN_SOUTH" or a number ("104", "0x68") and
// stores the kernel name; serial has its own rules (clients/serial/). Other
// top-level tables named in `extra_tables` (e.g. [serial]) are skipped here
// for the caller to read. Unknown fields, unknown buttons, a button bound
// twice and out-of-range values are errors naming file, line and column.
//
// A ButtonMap is an immutable value after parsing; thread-safe to read.
#ifndef TICKMARK_CLIENTS_KEYS_BUTTON_MAP_H_
#define TICKMARK_CLIENTS_KEYS_BUTTON_MAP_H_

#include <functional>
#include <map>
#include <optional>
#include <set>
#include <string>
#include <string_view>

#include "absl/status/statusor.h"
#include "clients/keys/key_map.h"

namespace tickmark::keys {

class ButtonMap {
 public:
  // Canonical name of a button, or nullopt (then `hint` says what is allowed).
  struct Namer {
    std::function<std::optional<std::string>(std::string_view)> canonical;
    std::string hint;
  };
  // Evdev key and button codes (clients/keys/evdev.h).
  static Namer EvdevNamer();

  static absl::StatusOr<ButtonMap> FromToml(std::string_view text,
                                            std::string_view source_name,
                                            const Namer& namer,
                                            const std::set<std::string>& extra_tables = {});
  static absl::StatusOr<ButtonMap> FromTomlFile(const std::string& path, const Namer& namer,
                                                const std::set<std::string>& extra_tables = {});

  // The binding of a canonical button name, or nullptr.
  const Binding* Find(const std::string& button) const;
  const std::map<std::string, Binding>& bindings() const { return bindings_; }
  const std::string& name() const { return name_; }
  const std::string& description() const { return description_; }
  // "KEY_PAGEDOWN,KEY_RIGHT approve  KEY_PAGEUP,KEY_LEFT disapprove", by value.
  std::string Legend() const;

 private:
  std::string name_;
  std::string description_;
  std::map<std::string, Binding> bindings_;
};

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_BUTTON_MAP_H_

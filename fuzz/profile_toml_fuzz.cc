// Fuzzes the TOML profiles that tickmark-keys and tickmark-serial read from
// files a user names (clients/keys/key_map.h, button_map.h,
// clients/serial/serial_source.h): every input goes through all three
// parsers. Checks: a refusal is INVALID_ARGUMENT with a message; an accepted
// profile binds only feedback values within ±kMaxFeedbackMagnitude, and its
// legend can be drawn.
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <string_view>

#include "absl/status/status.h"
#include "clients/keys/button_map.h"
#include "clients/keys/key_map.h"
#include "clients/serial/serial_source.h"

namespace {

using tickmark::keys::Binding;

void CheckRefusal(const absl::Status& s) {
  if (s.code() != absl::StatusCode::kInvalidArgument || s.message().empty()) __builtin_trap();
}

template <typename Map>
void CheckBindings(const Map& bindings) {
  for (const auto& [name, b] : bindings) {
    if (name.empty()) __builtin_trap();
    if (b.action == Binding::Action::kFeedback &&
        !(std::isfinite(b.value) && std::fabs(b.value) <= tickmark::keys::kMaxFeedbackMagnitude)) {
      __builtin_trap();
    }
  }
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  const std::string_view text(reinterpret_cast<const char*>(data), size);
  if (auto keys = tickmark::keys::KeyMap::FromToml(text, "fuzz.toml"); keys.ok()) {
    CheckBindings(keys->bindings());
    (void)keys->Legend();
  } else {
    CheckRefusal(keys.status());
  }
  if (auto buttons = tickmark::keys::ButtonMap::FromToml(text, "fuzz.toml",
                                                         tickmark::keys::ButtonMap::EvdevNamer());
      buttons.ok()) {
    CheckBindings(buttons->bindings());
    (void)buttons->Legend();
  } else {
    CheckRefusal(buttons.status());
  }
  if (auto serial = tickmark::serial::ParseSerialProfile(text, "fuzz.toml"); serial.ok()) {
    CheckBindings(serial->buttons.bindings());
    (void)serial->buttons.Legend();
  } else {
    CheckRefusal(serial.status());
  }
  return 0;
}

// What key profiles (key_map) and button profiles (button_map) share: the
// error format and the reading of one [[binding]] table's action, value and
// label. Internal to clients/keys. Pure functions; thread-safe.
#ifndef TICKMARK_CLIENTS_KEYS_PROFILE_TOML_H_
#define TICKMARK_CLIENTS_KEYS_PROFILE_TOML_H_

#include <string>
#include <string_view>

#include <toml++/toml.h>

#include "absl/status/statusor.h"
#include "clients/keys/key_map.h"

namespace tickmark::keys::profile {

// "SOURCE:LINE:COLUMN: what", as INVALID_ARGUMENT.
absl::Status Error(std::string_view source, const toml::source_region& at,
                   const std::string& what);

// "+1", "-0.5": how a value is shown when a binding has no label.
std::string FormatValue(double v);

// Reads `action` / `value` / `label` of one binding table. Besides those,
// only `input_field` ("keys" or "buttons") may appear; it is the caller's to
// read. `ctx` prefixes messages ("binding 3: ").
absl::StatusOr<Binding> ParseBinding(std::string_view source, const toml::table& t,
                                     const toml::node& entry, const std::string& ctx,
                                     std::string_view input_field);

}  // namespace tickmark::keys::profile

#endif  // TICKMARK_CLIENTS_KEYS_PROFILE_TOML_H_

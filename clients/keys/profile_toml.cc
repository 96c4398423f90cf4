#include "clients/keys/profile_toml.h"

#include <cmath>
#include <sstream>

namespace tickmark::keys::profile {

absl::Status Error(std::string_view source, const toml::source_region& at,
                   const std::string& what) {
  std::ostringstream os;
  os << source << ":" << at.begin.line << ":" << at.begin.column << ": " << what;
  return absl::InvalidArgumentError(os.str());
}

std::string FormatValue(double v) {
  std::ostringstream os;
  if (v > 0) os << '+';
  os << v;
  return os.str();
}

absl::StatusOr<Binding> ParseBinding(std::string_view source, const toml::table& t,
                                     const toml::node& entry, const std::string& ctx,
                                     std::string_view input_field) {
  for (const auto& [k, node] : t) {
    const std::string field(k.str());
    if (field != input_field && field != "value" && field != "label" && field != "action") {
      return Error(source, k.source(),
                   ctx + "unknown field \"" + field + "\" (expected " + std::string(input_field) +
                       ", value, label, action)");
    }
  }
  Binding b;
  const toml::node* action = t.get("action");
  const toml::node* value = t.get("value");
  if (action != nullptr) {
    if (!action->is_string() || **action->as_string() != "quit") {
      return Error(source, action->source(), ctx + "action must be \"quit\"");
    }
    if (value != nullptr) {
      return Error(source, value->source(), ctx + "a quit binding takes no value");
    }
    b.action = Binding::Action::kQuit;
    b.label = "quit";
  } else {
    if (value == nullptr) {
      return Error(source, entry.source(), ctx + "needs a value (or action = \"quit\")");
    }
    if (value->is_integer()) {
      b.value = static_cast<double>(**value->as_integer());
    } else if (value->is_floating_point()) {
      b.value = **value->as_floating_point();
    } else {
      return Error(source, value->source(), ctx + "value must be a number");
    }
    if (!std::isfinite(b.value) || std::fabs(b.value) > kMaxFeedbackMagnitude) {
      return Error(source, value->source(), ctx + "value must be finite and within [-1000, 1000]");
    }
    b.label = FormatValue(b.value);
  }
  if (const toml::node* label = t.get("label"); label != nullptr) {
    if (!label->is_string()) return Error(source, label->source(), ctx + "label must be a string");
    b.label = **label->as_string();
  }
  return b;
}

}  // namespace tickmark::keys::profile

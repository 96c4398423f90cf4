#include "clients/keys/button_map.h"

#include <algorithm>
#include <cmath>
#include <fstream>
#include <sstream>
#include <utility>
#include <vector>

#include <toml++/toml.h>

#include "clients/keys/evdev.h"
#include "clients/keys/profile_toml.h"

namespace tickmark::keys {
namespace {

using profile::Error;

}  // namespace

ButtonMap::Namer ButtonMap::EvdevNamer() {
  Namer n;
  n.canonical = [](std::string_view name) -> std::optional<std::string> {
    std::optional<uint16_t> code = KeyCodeFromName(name);
    if (!code) return std::nullopt;
    return KeyCodeName(*code);
  };
  n.hint = "use a kernel key name (KEY_PAGEDOWN, BTN_SOUTH, see tickmark-keys "
           "--list-devices) or a code number";
  return n;
}

absl::StatusOr<ButtonMap> ButtonMap::FromToml(std::string_view text,
                                              std::string_view source_name,
                                              const Namer& namer,
                                              const std::set<std::string>& extra_tables) {
  toml::table root;
  try {
    root = toml::parse(text, source_name);
  } catch (const toml::parse_error& e) {
    return Error(source_name, e.source(), std::string(e.description()));
  }
  ButtonMap m;
  m.name_ = std::string(source_name);
  for (const auto& [k, node] : root) {
    const std::string key(k.str());
    if (key == "name" || key == "description") {
      if (!node.is_string()) return Error(source_name, node.source(), key + " must be a string");
      (key == "name" ? m.name_ : m.description_) = **node.as_string();
    } else if (key != "binding" && extra_tables.count(key) == 0) {
      return Error(source_name, k.source(),
                   "unknown field \"" + key + "\" (expected name, description, [[binding]])");
    }
  }
  const toml::node* bindings = root.get("binding");
  if (bindings == nullptr || !bindings->is_array_of_tables()) {
    return absl::InvalidArgumentError(std::string(source_name) +
                                      ": no [[binding]] tables; bind at least one button");
  }
  std::map<std::string, int64_t> first_line;
  int index = 0;
  bool any_feedback = false;
  for (const toml::node& entry : *bindings->as_array()) {
    ++index;
    const toml::table& t = *entry.as_table();
    const std::string ctx = "binding " + std::to_string(index) + ": ";
    auto parsed = profile::ParseBinding(source_name, t, entry, ctx, "buttons");
    if (!parsed.ok()) return parsed.status();
    const Binding b = *parsed;
    any_feedback |= b.action == Binding::Action::kFeedback;
    const toml::node* buttons = t.get("buttons");
    if (buttons == nullptr || !buttons->is_array() || buttons->as_array()->empty()) {
      return Error(source_name, (buttons != nullptr ? *buttons : entry).source(),
                   ctx + "buttons must be a non-empty array of button names");
    }
    for (const toml::node& bn : *buttons->as_array()) {
      if (!bn.is_string()) return Error(source_name, bn.source(), ctx + "a button name must be a string");
      const std::string raw = **bn.as_string();
      std::optional<std::string> name = namer.canonical(raw);
      if (!name) {
        return Error(source_name, bn.source(),
                     ctx + "unknown button \"" + raw + "\"; " + namer.hint);
      }
      if (auto it = first_line.find(*name); it != first_line.end()) {
        return Error(source_name, bn.source(),
                     ctx + "button \"" + raw + "\" is already bound at line " +
                         std::to_string(it->second));
      }
      first_line[*name] = bn.source().begin.line;
      m.bindings_[*name] = b;
    }
  }
  if (!any_feedback) {
    return absl::InvalidArgumentError(std::string(source_name) + ": no binding sends feedback");
  }
  return m;
}

absl::StatusOr<ButtonMap> ButtonMap::FromTomlFile(const std::string& path, const Namer& namer,
                                                  const std::set<std::string>& extra_tables) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return absl::NotFoundError("cannot read profile " + path);
  std::stringstream ss;
  ss << in.rdbuf();
  return FromToml(ss.str(), path, namer, extra_tables);
}

const Binding* ButtonMap::Find(const std::string& button) const {
  auto it = bindings_.find(button);
  return it == bindings_.end() ? nullptr : &it->second;
}

std::string ButtonMap::Legend() const {
  // Group buttons by binding, feedback in falling value order, quit last.
  std::vector<std::pair<Binding, std::string>> groups;
  for (const auto& [button, b] : bindings_) {
    bool found = false;
    for (auto& [gb, names] : groups) {
      if (gb.action == b.action && gb.value == b.value && gb.label == b.label) {
        names += "," + button;
        found = true;
        break;
      }
    }
    if (!found) groups.push_back({b, button});
  }
  std::stable_sort(groups.begin(), groups.end(), [](const auto& x, const auto& y) {
    const bool qx = x.first.action == Binding::Action::kQuit;
    const bool qy = y.first.action == Binding::Action::kQuit;
    if (qx != qy) return qy;
    return x.first.value > y.first.value;
  });
  std::string out;
  for (const auto& [b, names] : groups) {
    if (!out.empty()) out += "  ";
    out += names + " " + b.label;
  }
  return out;
}

}  // namespace tickmark::keys

#include "clients/keys/key_map.h"

#include <algorithm>
#include <cmath>
#include <fstream>
#include <set>
#include <sstream>
#include <utility>

#include <toml++/toml.h>

#include "clients/keys/profile_toml.h"

namespace tickmark::keys {
namespace {

constexpr char kEsc = '\x1b';

const std::set<std::string, std::less<>>& NamedKeys() {
  static const auto* const kNames = new std::set<std::string, std::less<>>{
      "space", "enter", "tab", "backspace", "up", "down", "left", "right"};
  return *kNames;
}

absl::Status ProfileError(std::string_view source, const toml::source_region& at,
                          const std::string& what) {
  return profile::Error(source, at, what);
}

absl::Status ProfileError(std::string_view source, const toml::node& node,
                          const std::string& what) {
  return ProfileError(source, node.source(), what);
}

}  // namespace

bool KeyMap::IsKeyName(std::string_view name) {
  if (name.size() == 1) return name[0] > ' ' && name[0] < '\x7f';
  return NamedKeys().count(name) != 0;
}

KeyMap KeyMap::Defaults() {
  KeyMap m;
  m.name_ = "default";
  const Binding approve{Binding::Action::kFeedback, 1.0, "approve"};
  const Binding disapprove{Binding::Action::kFeedback, -1.0, "disapprove"};
  m.bindings_["f"] = approve;
  m.bindings_["+"] = approve;
  m.bindings_["j"] = disapprove;
  m.bindings_["-"] = disapprove;
  m.bindings_["q"] = Binding{Binding::Action::kQuit, 0, "quit"};
  return m;
}

absl::StatusOr<KeyMap> KeyMap::FromToml(std::string_view text,
                                        std::string_view source_name) {
  toml::table root;
  try {
    root = toml::parse(text, source_name);
  } catch (const toml::parse_error& e) {
    return ProfileError(source_name, e.source(), std::string(e.description()));
  }
  KeyMap m;
  m.name_ = std::string(source_name);
  std::map<std::string, toml::source_position> first_bound;
  for (const auto& [k, node] : root) {
    const std::string key(k.str());
    if (key == "name" || key == "description") {
      if (!node.is_string()) return ProfileError(source_name, node, key + " must be a string");
      if (key == "name") m.name_ = **node.as_string();
    } else if (key != "binding") {
      return ProfileError(source_name, k.source(),
                          "unknown field \"" + key +
                              "\" (expected name, description, [[binding]])");
    }
  }
  const toml::node* bindings = root.get("binding");
  if (bindings == nullptr || !bindings->is_array_of_tables()) {
    return absl::InvalidArgumentError(
        std::string(source_name) +
        ": no [[binding]] tables; a profile must bind at least one key");
  }
  int index = 0;
  bool any_feedback = false;
  for (const toml::node& entry : *bindings->as_array()) {
    ++index;
    const toml::table& t = *entry.as_table();
    const std::string ctx = "binding " + std::to_string(index) + ": ";
    auto parsed = profile::ParseBinding(source_name, t, entry, ctx, "keys");
    if (!parsed.ok()) return parsed.status();
    const Binding b = *parsed;
    any_feedback |= b.action == Binding::Action::kFeedback;
    const toml::node* keys = t.get("keys");
    if (keys == nullptr || !keys->is_array() || keys->as_array()->empty()) {
      return ProfileError(source_name, keys != nullptr ? *keys : entry,
                          ctx + "keys must be a non-empty array of key names");
    }
    for (const toml::node& kn : *keys->as_array()) {
      if (!kn.is_string()) return ProfileError(source_name, kn, ctx + "a key name must be a string");
      const std::string name = **kn.as_string();
      if (!IsKeyName(name)) {
        return ProfileError(
            source_name, kn,
            ctx + "unknown key \"" + name +
                "\"; use one printable character or one of space, enter, "
                "tab, backspace, up, down, left, right");
      }
      if (auto it = first_bound.find(name); it != first_bound.end()) {
        return ProfileError(source_name, kn,
                            ctx + "key \"" + name + "\" is already bound at line " +
                                std::to_string(it->second.line));
      }
      first_bound[name] = kn.source().begin;
      m.bindings_[name] = b;
    }
  }
  if (!any_feedback) {
    return absl::InvalidArgumentError(std::string(source_name) +
                                      ": no binding sends feedback");
  }
  return m;
}

absl::StatusOr<KeyMap> KeyMap::FromTomlFile(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return absl::NotFoundError("cannot read profile " + path);
  std::stringstream ss;
  ss << in.rdbuf();
  return FromToml(ss.str(), path);
}

KeyEvent KeyMap::EventFor(std::string key) const {
  KeyEvent e;
  auto it = bindings_.find(key);
  if (it != bindings_.end()) {
    e.kind = it->second.action == Binding::Action::kQuit ? KeyEvent::Kind::kQuit
                                                          : KeyEvent::Kind::kFeedback;
    e.value = it->second.value;
    e.label = it->second.label;
  }
  e.key = std::move(key);
  return e;
}

std::vector<KeyEvent> KeyMap::Feed(std::string_view bytes) {
  std::vector<KeyEvent> out;
  for (size_t i = 0; i < bytes.size(); ++i) {
    const char c = bytes[i];
    const auto u = static_cast<unsigned char>(c);
    switch (state_) {
      case DecodeState::kUtf8:
        // Non-ASCII characters cannot be bound; skip their continuation bytes.
        if ((u & 0xC0) == 0x80 && --utf8_remaining_ > 0) continue;
        state_ = DecodeState::kNormal;
        if ((u & 0xC0) == 0x80) continue;
        break;  // not a continuation byte: decode it normally below
      case DecodeState::kEscape:
        if (c == '[' || c == 'O') {
          state_ = DecodeState::kSequence;
          sequence_.clear();
          continue;
        }
        // ESC then an ordinary byte: a lone Escape press (or Alt+key).
        out.push_back(EventFor("escape"));
        state_ = DecodeState::kNormal;
        break;
      case DecodeState::kSequence:
        if (u >= 0x40 && u <= 0x7E) {  // ECMA-48 §5.4: final byte of a CSI sequence
          state_ = DecodeState::kNormal;
          static constexpr std::pair<char, const char*> kArrows[] = {
              {'A', "up"}, {'B', "down"}, {'C', "right"}, {'D', "left"}};
          std::string name = "escape-sequence";
          if (sequence_.empty()) {
            for (const auto& [final_byte, arrow] : kArrows) {
              if (c == final_byte) name = arrow;
            }
          }
          out.push_back(EventFor(name));
        } else if (sequence_.size() < 16) {
          sequence_ += c;
        } else {  // runaway sequence: give up on it
          state_ = DecodeState::kNormal;
        }
        continue;
      case DecodeState::kNormal:
        break;
    }
    if (c == kEsc) {
      state_ = DecodeState::kEscape;
    } else if (c == ' ') {
      out.push_back(EventFor("space"));
    } else if (c == '\r' || c == '\n') {
      out.push_back(EventFor("enter"));
    } else if (c == '\t') {
      out.push_back(EventFor("tab"));
    } else if (c == '\x7f' || c == '\b') {
      out.push_back(EventFor("backspace"));
    } else if (u > ' ' && u < 0x7f) {
      out.push_back(EventFor(std::string(1, c)));
    } else if (u >= 0xC0) {
      state_ = DecodeState::kUtf8;
      utf8_remaining_ = u >= 0xF0 ? 3 : u >= 0xE0 ? 2 : 1;
      out.push_back(EventFor("non-ascii"));
    } else {
      out.push_back(EventFor("control-" + std::to_string(u)));
    }
  }
  return out;
}

std::vector<KeyEvent> KeyMap::FlushPending() {
  std::vector<KeyEvent> out;
  if (state_ == DecodeState::kEscape) out.push_back(EventFor("escape"));
  state_ = DecodeState::kNormal;
  return out;
}

std::string KeyMap::Legend() const {
  // Group keys by binding, in order of value (quit last).
  std::vector<std::pair<const Binding*, std::string>> groups;
  for (const auto& entry : bindings_) {
    // Not a structured binding: clang 14 (the fuzz build) cannot capture one.
    const std::string& key = entry.first;
    const Binding& b = entry.second;
    auto it = std::find_if(groups.begin(), groups.end(), [&](const auto& g) {
      return g.first->action == b.action && g.first->value == b.value &&
             g.first->label == b.label;
    });
    if (it == groups.end()) {
      groups.emplace_back(&b, key);
    } else {
      it->second += "," + key;
    }
  }
  std::stable_sort(groups.begin(), groups.end(), [](const auto& a, const auto& b) {
    const bool qa = a.first->action == Binding::Action::kQuit;
    const bool qb = b.first->action == Binding::Action::kQuit;
    if (qa != qb) return qb;
    return a.first->value > b.first->value;
  });
  std::string out;
  for (const auto& [b, keys] : groups) {
    if (!out.empty()) out += "  ";
    out += keys + " " + b->label;
  }
  return out;
}

}  // namespace tickmark::keys

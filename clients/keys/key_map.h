// KeyMap: which terminal key sends which feedback, and the decoder that turns
// the bytes a terminal delivers into key presses.
//
// Parsing only, no I/O: the program reads bytes from the terminal and feeds
// them here, so tests feed bytes. Keys are named by the character they type
// ("f", "+", "1") or by one of: space, enter, tab, backspace, up, down, left,
// right (arrow keys arrive as ESC [ A … ESC [ D or ESC O A … ESC O D).
//
// Default bindings (also shipped as clients/keys/profiles/terminal.toml):
//   f  +   → +1  approve
//   j  -   → −1  disapprove
//   q      → quit
// f and j sit under the index fingers on a QWERTY keyboard, + and - on the
// number pad; both hands have a key for each judgement.
//
// A profile (TOML) replaces the defaults entirely:
//   name = "graded"
//   [[binding]]
//   keys = ["1"]
//   value = -1.0         # in [-1000, 1000], records.proto Feedback.value
//   label = "bad"
//   [[binding]]
//   keys = ["q"]
//   action = "quit"
// Unknown fields, unknown key names, a key bound twice and out-of-range
// values are errors that name the file, line and column.
//
// A KeyMap is a value; Feed() keeps the state of a half-read escape sequence,
// so one instance belongs to one input stream. Thread-compatible.
#ifndef TICKMARK_CLIENTS_KEYS_KEY_MAP_H_
#define TICKMARK_CLIENTS_KEYS_KEY_MAP_H_

#include <map>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/statusor.h"

namespace tickmark::keys {

inline constexpr double kMaxFeedbackMagnitude = 1000.0;

struct Binding {
  enum class Action { kFeedback, kQuit };
  Action action = Action::kFeedback;
  double value = 0;   // for kFeedback
  std::string label;  // for the legend: "approve"
};

struct KeyEvent {
  enum class Kind { kFeedback, kQuit, kUnbound };
  Kind kind = Kind::kUnbound;
  std::string key;   // the key's name: "f", "up", "space"
  double value = 0;  // for kFeedback
  std::string label;
  // The label the feedback carries on the wire (FeedbackMessage.input).
  std::string input() const { return "key:" + key; }
};

class KeyMap {
 public:
  // The default bindings above.
  static KeyMap Defaults();
  // `source_name` names the text in error messages (usually the path).
  static absl::StatusOr<KeyMap> FromToml(std::string_view text,
                                         std::string_view source_name);
  static absl::StatusOr<KeyMap> FromTomlFile(const std::string& path);

  // True for a name a binding may use.
  static bool IsKeyName(std::string_view name);

  // Decodes bytes into key presses (in order). An escape sequence split
  // across calls is completed by the next call.
  std::vector<KeyEvent> Feed(std::string_view bytes);
  // Ends a pending lone ESC (the caller saw no byte follow it for a while);
  // returns it as an unbound "escape" press, if one was pending.
  std::vector<KeyEvent> FlushPending();

  const std::map<std::string, Binding>& bindings() const { return bindings_; }
  const std::string& name() const { return name_; }
  // "f,+ approve  j,- disapprove  q quit", in value order, quit last.
  std::string Legend() const;

 private:
  enum class DecodeState { kNormal, kEscape, kSequence, kUtf8 };

  KeyEvent EventFor(std::string key) const;

  std::string name_ = "default";
  std::map<std::string, Binding> bindings_;  // key name → binding
  DecodeState state_ = DecodeState::kNormal;
  std::string sequence_;    // parameter bytes of the current ESC sequence
  int utf8_remaining_ = 0;  // continuation bytes still to skip
};

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_KEY_MAP_H_

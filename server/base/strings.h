// String building for messages. (Debian's absl is built without
// std::string_view interop, so absl::StrCat cannot take std::string_view.)
#ifndef TICKMARK_SERVER_BASE_STRINGS_H_
#define TICKMARK_SERVER_BASE_STRINGS_H_

#include <sstream>
#include <string>

namespace tickmark {

// Concatenates anything that streams, e.g. Cat("no session '", id, "'").
template <typename... Args>
std::string Cat(const Args&... args) {
  std::ostringstream out;
  (out << ... << args);
  return out.str();
}

}  // namespace tickmark

#endif  // TICKMARK_SERVER_BASE_STRINGS_H_

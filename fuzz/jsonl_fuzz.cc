// Fuzzes the JSON Lines writer of `tickmark export` (clients/cli/jsonl.h) on
// Records decoded from arbitrary bytes (protobuf ParseFromArray, so every
// field, enum value and nesting the wire format allows). Checks that each
// output is exactly one line holding one valid JSON object (RFC 8259) in
// valid UTF-8 (RFC 3629), which is what `pandas.read_json(lines=True)` and
// any other JSON Lines reader need.
#include <cstddef>
#include <cstdint>
#include <string>
#include <string_view>

#include <google/protobuf/stubs/logging.h>

#include "clients/cli/jsonl.h"
#include "tickmark/v1/records.pb.h"

namespace {

// A strict RFC 8259 syntax check: one value, nothing after it.
class JsonChecker {
 public:
  explicit JsonChecker(std::string_view s) : s_(s) {}

  bool OneObject() {
    Space();
    if (Peek() != '{' || !Value(0)) return false;
    Space();
    return at_ == s_.size();
  }

 private:
  static constexpr int kMaxDepth = 200;

  char Peek() const { return at_ < s_.size() ? s_[at_] : '\0'; }
  void Space() {
    while (at_ < s_.size() && (s_[at_] == ' ' || s_[at_] == '\t' || s_[at_] == '\r')) ++at_;
  }
  bool Literal(std::string_view word) {
    if (s_.substr(at_, word.size()) != word) return false;
    at_ += word.size();
    return true;
  }
  bool Value(int depth) {
    if (depth > kMaxDepth) return false;
    Space();
    switch (Peek()) {
      case '{': return Object(depth);
      case '[': return Array(depth);
      case '"': return String();
      case 't': return Literal("true");
      case 'f': return Literal("false");
      case 'n': return Literal("null");
      default: return Number();
    }
  }
  bool Object(int depth) {
    ++at_;
    Space();
    if (Peek() == '}') return ++at_, true;
    while (true) {
      Space();
      if (!String()) return false;
      Space();
      if (Peek() != ':') return false;
      ++at_;
      if (!Value(depth + 1)) return false;
      Space();
      if (Peek() == '}') return ++at_, true;
      if (Peek() != ',') return false;
      ++at_;
    }
  }
  bool Array(int depth) {
    ++at_;
    Space();
    if (Peek() == ']') return ++at_, true;
    while (true) {
      if (!Value(depth + 1)) return false;
      Space();
      if (Peek() == ']') return ++at_, true;
      if (Peek() != ',') return false;
      ++at_;
    }
  }
  static bool Digit(char c) { return c >= '0' && c <= '9'; }
  bool Digits() {
    const size_t start = at_;
    while (Digit(Peek())) ++at_;
    return at_ > start;
  }
  bool Number() {
    if (Peek() == '-') ++at_;
    if (Peek() == '0') {
      ++at_;
    } else if (!Digits()) {
      return false;
    }
    if (Peek() == '.') {
      ++at_;
      if (!Digits()) return false;
    }
    if (Peek() == 'e' || Peek() == 'E') {
      ++at_;
      if (Peek() == '+' || Peek() == '-') ++at_;
      if (!Digits()) return false;
    }
    return true;
  }
  static bool Hex(char c) {
    return Digit(c) || (c >= 'a' && c <= 'f') || (c >= 'A' && c <= 'F');
  }
  bool String() {
    if (Peek() != '"') return false;
    ++at_;
    while (at_ < s_.size()) {
      const auto c = static_cast<unsigned char>(s_[at_]);
      if (c == '"') return ++at_, true;
      if (c < 0x20) return false;  // RFC 8259 §7: control characters escaped
      if (c == '\\') {
        ++at_;
        const char e = Peek();
        if (e == 'u') {
          for (int i = 1; i <= 4; ++i) {
            if (!Hex(at_ + i < s_.size() ? s_[at_ + i] : '\0')) return false;
          }
          at_ += 5;
        } else if (std::string_view("\"\\/bfnrt").find(e) != std::string_view::npos && e) {
          ++at_;
        } else {
          return false;
        }
        continue;
      }
      if (!Utf8()) return false;
    }
    return false;
  }
  // One UTF-8 sequence (RFC 3629 §4): no overlongs, no surrogates, ≤ U+10FFFF.
  bool Utf8() {
    const auto b = [&](size_t i) {
      return at_ + i < s_.size() ? static_cast<unsigned char>(s_[at_ + i]) : 0u;
    };
    const unsigned c = b(0);
    const auto cont = [&](size_t i, unsigned lo = 0x80, unsigned hi = 0xBF) {
      return b(i) >= lo && b(i) <= hi;
    };
    size_t n = 0;
    if (c < 0x80) n = 1;
    else if (c >= 0xC2 && c <= 0xDF && cont(1)) n = 2;
    else if (c == 0xE0 && cont(1, 0xA0) && cont(2)) n = 3;
    else if (((c >= 0xE1 && c <= 0xEC) || c == 0xEE || c == 0xEF) && cont(1) && cont(2)) n = 3;
    else if (c == 0xED && cont(1, 0x80, 0x9F) && cont(2)) n = 3;
    else if (c == 0xF0 && cont(1, 0x90) && cont(2) && cont(3)) n = 4;
    else if (c >= 0xF1 && c <= 0xF3 && cont(1) && cont(2) && cont(3)) n = 4;
    else if (c == 0xF4 && cont(1, 0x80, 0x8F) && cont(2) && cont(3)) n = 4;
    at_ += n;
    return n > 0;
  }

  std::string_view s_;
  size_t at_ = 0;
};

}  // namespace

extern "C" int LLVMFuzzerInitialize(int*, char***) {
  // Invalid UTF-8 in a string field makes protobuf log an error per input.
  google::protobuf::SetLogHandler(nullptr);
  return 0;
}

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  tickmark::v1::Record record;
  if (!record.ParseFromArray(data, static_cast<int>(size))) return -1;  // not a Record
  const std::string line = tickmark::cli::RecordToJsonLine(record);
  if (line.find('\n') != std::string::npos) __builtin_trap();
  if (!JsonChecker(line).OneObject()) __builtin_trap();
  (void)tickmark::cli::RecordSessionNs(record);
  return 0;
}

// Fuzzes tickmark-voice's TOML profiles (clients/voice/voice_profile.h), read
// from files a user names. Checks: a refusal is INVALID_ARGUMENT with a
// message; an accepted profile has at least one phrase, each normalised
// (lower-case letters, apostrophes, single inner spaces, at most
// kMaxPhraseBytes), unique, with a value within ±kMaxFeedbackMagnitude and a
// threshold within [kMinThreshold, kMaxThreshold]; its legend can be drawn.
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <set>
#include <string_view>

#include "absl/status/status.h"
#include "clients/keys/key_map.h"
#include "clients/voice/voice_profile.h"

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  using namespace tickmark::voice;
  const std::string_view text(reinterpret_cast<const char*>(data), size);
  auto p = ParseVoiceProfile(text, "fuzz.toml");
  if (!p.ok()) {
    if (p.status().code() != absl::StatusCode::kInvalidArgument || p.status().message().empty()) {
      __builtin_trap();
    }
    return 0;
  }
  if (p->phrases.empty()) __builtin_trap();
  std::set<std::string> seen;
  for (const Phrase& ph : p->phrases) {
    if (ph.text.empty() || ph.text.size() > kMaxPhraseBytes) __builtin_trap();
    if (ph.text.front() == ' ' || ph.text.back() == ' ') __builtin_trap();
    char prev = 0;
    for (char c : ph.text) {
      if (!((c >= 'a' && c <= 'z') || c == '\'' || c == ' ')) __builtin_trap();
      if (c == ' ' && prev == ' ') __builtin_trap();
      prev = c;
    }
    if (!seen.insert(ph.text).second) __builtin_trap();
    if (!std::isfinite(ph.value) || std::fabs(ph.value) > tickmark::keys::kMaxFeedbackMagnitude) {
      __builtin_trap();
    }
    if (!(ph.threshold >= kMinThreshold && ph.threshold <= kMaxThreshold)) __builtin_trap();
    auto again = NormalisePhrase(ph.text);
    if (!again.ok() || *again != ph.text) __builtin_trap();
  }
  if (!(p->recogniser.max_phrase_s >= 0.3 && p->recogniser.max_phrase_s <= 10)) __builtin_trap();
  (void)p->Legend();
  return 0;
}

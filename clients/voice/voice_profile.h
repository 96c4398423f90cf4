// VoiceProfile: which spoken phrases tickmark-voice listens for and what
// feedback each sends — the TOML profiles in clients/voice/profiles/.
//
//   name = "en-basic"
//   description = "four approving, three disapproving phrases"
//   [recogniser]                 # optional
//   model = "/usr/share/pocketsphinx/model/en-us/en-us"     # acoustic model folder
//   dictionary = "/usr/share/pocketsphinx/model/en-us/cmudict-en-us.dict"
//   threshold = 1e-20            # default for phrases that give none
//   max_phrase_s = 2.0           # a detection longer than this is dropped
//   [[phrase]]
//   text = "good job"            # words of the dictionary, lower case
//   value = 1.0                  # in [-1000, 1000], records.proto Feedback.value
//   threshold = 1e-17            # the spotter's likelihood-ratio threshold:
//                                # smaller detects more (and more falsely)
//   label = "approve"            # optional, for the legend
//
// The model and dictionary default to Debian's pocketsphinx-en-us; relative
// paths are taken from the profile's folder. Phrase text is lower-cased and
// its spaces collapsed; it must fit the feedback's input label (kMaxPhraseBytes).
// Unknown fields, a phrase given twice, bad thresholds and out-of-range values
// are errors naming the file, line and column. Whether the words are in the
// dictionary is checked when the spotter loads it (keyword_spotter.h).
//
// Parsing only, no I/O but LoadVoiceProfile's read of the file. A
// VoiceProfile is a value; thread-safe to read.
#ifndef TICKMARK_CLIENTS_VOICE_VOICE_PROFILE_H_
#define TICKMARK_CLIENTS_VOICE_VOICE_PROFILE_H_

#include <cstddef>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/statusor.h"

namespace tickmark::voice {

// The feedback's input label is at most 64 bytes (server/rpc/validation.cc);
// "voice:" + phrase + " onset=recogniser lat=99999ms" must fit.
inline constexpr size_t kMaxPhraseBytes = 28;
inline constexpr double kMinThreshold = 1e-100;
inline constexpr double kMaxThreshold = 1e+50;
inline constexpr double kDefaultThreshold = 1e-20;

struct Phrase {
  std::string text;  // normalised: lower case, single spaces
  double value = 0;
  double threshold = kDefaultThreshold;
  std::string label;  // "+1" when the profile gives none
};

struct RecogniserSettings {
  std::string model;       // empty: the default (keyword_spotter.h)
  std::string dictionary;  // empty: the default
  double max_phrase_s = 2.0;
};

struct VoiceProfile {
  std::string name;
  std::string description;
  RecogniserSettings recogniser;
  std::vector<Phrase> phrases;  // in the file's order

  // "good job, well done approve  not like that disapprove", by value.
  std::string Legend() const;
};

// Lower-cases and collapses runs of spaces; INVALID_ARGUMENT (naming the
// character) for anything but letters, apostrophes and spaces.
absl::StatusOr<std::string> NormalisePhrase(std::string_view text);

absl::StatusOr<VoiceProfile> ParseVoiceProfile(std::string_view text, std::string_view source_name);
// Reads and parses `path`; relative model and dictionary paths become
// relative to the profile's folder.
absl::StatusOr<VoiceProfile> LoadVoiceProfile(const std::string& path);

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_VOICE_PROFILE_H_

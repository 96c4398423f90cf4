// Onset search: where a spoken phrase really began, refined from the
// recogniser's word segmentation with the short-time energy of the audio
// around it.
//
// The recogniser's start frame is only as good as its alignment (it moves by
// tens of milliseconds with noise and with what came before). The energy
// onset is a double-threshold endpoint detector (the two-level energy rule
// of classic speech endpoint detection, Rabiner & Sambur 1975; from memory):
//  1. short-time energy in dB, `window_s` frames every `hop_s`;
//  2. the noise floor: the `floor_percentile` of the frames in the
//     `floor_s` before the search window;
//  3. the level of the phrase: the 95th percentile between the recogniser's
//     start and end;
//  4. in the search window [start - back_s, start + forward_s], the first
//     frame that stays above the upper threshold for `hold_s`, where upper =
//     floor + clamp(on_fraction x (level - floor), on_min_db, on_max_db),
//     and at least `above_noise_db` over the 95th percentile of the floor
//     frames (so that the noise's own swings do not pass it);
//  5. from there, back while the energy stays above the lower threshold,
//     floor + clamp(low_fraction x (level - floor), low_min_db, on_max_db / 3).
// The onset is the centre of the first frame of that run. The recogniser's
// start is kept (method kRecogniser) when no frame qualifies (too noisy),
// when the run reaches the window's start (the phrase is joined to earlier
// speech), or when too little audio precedes the window for a floor.
//
// Pure function, no I/O, no state; thread-safe. Tested by feeding samples.
#ifndef TICKMARK_CLIENTS_VOICE_ONSET_H_
#define TICKMARK_CLIENTS_VOICE_ONSET_H_

#include <cstdint>
#include <span>
#include <string>

namespace tickmark::voice {

struct OnsetOptions {
  double window_s = 0.010;
  double hop_s = 0.005;
  double floor_s = 0.8;
  double floor_percentile = 20;
  double back_s = 0.35;
  double forward_s = 0.25;
  double hold_s = 0.02;
  double above_noise_db = 2;
  double on_fraction = 0.3;
  double on_min_db = 3;
  double on_max_db = 9;
  double low_fraction = 0.25;
  double low_min_db = 1.5;
};

enum class OnsetMethod { kEnergy, kRecogniser };
const char* OnsetMethodName(OnsetMethod m);  // "energy", "recogniser"

struct Onset {
  int64_t index = 0;  // sample index of the onset (same numbering as the input)
  OnsetMethod method = OnsetMethod::kRecogniser;
  std::string why;  // for kRecogniser: why the energy search gave up
  double floor_db = 0;
  double level_db = 0;
};

// `audio` holds samples first_index, first_index+1, ...; `start` and `end`
// are the recogniser's segmentation in the same numbering. Audio missing
// before or after is tolerated (the search uses what is there).
Onset FindOnset(std::span<const int16_t> audio, int64_t first_index, int64_t start, int64_t end,
                int sample_rate, const OnsetOptions& options = {});

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_ONSET_H_

// VoiceDetector: the listening pipeline from samples to timed phrases. It
// feeds the KeywordSpotter, keeps the last seconds of audio, refines each
// accepted phrase's start with the onset search (onset.h) and maps the onset
// to CLOCK_MONOTONIC with the SampleClock. It also judges when nobody is
// speaking (for the spotter's decoder restarts): the last 0.3 s are within
// 6 dB of the quietest 50 ms blocks of the last 10 s.
//
// Event times are the onset: the moment the trainer started the phrase, not
// the moment the recogniser knew it (0.3-1 s later), so credit goes to the
// steps the trainer was judging (docs/voice.md).
//
// Not thread-safe: the audio thread owns it.
#ifndef TICKMARK_CLIENTS_VOICE_VOICE_DETECTOR_H_
#define TICKMARK_CLIENTS_VOICE_VOICE_DETECTOR_H_

#include <cstdint>
#include <deque>
#include <optional>
#include <span>
#include <vector>

#include "clients/voice/keyword_spotter.h"
#include "clients/voice/onset.h"
#include "clients/voice/sample_clock.h"
#include "clients/voice/voice_profile.h"

namespace tickmark::voice {

struct VoiceEvent {
  Heard heard;                     // the recogniser's view, accepted or not
  const Phrase* phrase = nullptr;  // into the detector's profile
  Onset onset;                     // refined start (accepted phrases only)
  // CLOCK_MONOTONIC nanoseconds of the onset, the recogniser's start, the
  // phrase's end and the moment (in audio time) the phrase became final;
  // nullopt while the sample clock cannot map (no timing seen yet).
  std::optional<int64_t> onset_ns, recogniser_ns, end_ns, settled_ns;
  // The audio kept for --keep-audio: samples window_first, ...
  std::vector<int16_t> window;
  int64_t window_first = 0;
};

class VoiceDetector {
 public:
  struct Options {
    OnsetOptions onset;
    bool keep_windows = false;     // fill VoiceEvent::window
    double window_before_s = 0.5;  // kept before the onset
    double window_after_s = 0.25;  // kept after the end
    double ring_s = 8;             // audio held for the onset search
  };
  struct Stats {
    uint64_t samples = 0;
    uint64_t gaps = 0;
    uint64_t accepted = 0;
    uint64_t rejected = 0;
    uint64_t energy_onsets = 0;
    uint64_t recogniser_onsets = 0;
  };

  // `profile`, `spotter` and `clock` must outlive the detector.
  VoiceDetector(const VoiceProfile* profile, KeywordSpotter* spotter, const SampleClock* clock,
                Options options);
  VoiceDetector(const VoiceProfile* profile, KeywordSpotter* spotter, const SampleClock* clock)
      : VoiceDetector(profile, spotter, clock, Options{}) {}

  // Samples first_index, ...; a first_index other than the next expected
  // one is a gap (the ring and the spotter start over). Returns the phrases
  // that became final, accepted or not, in order.
  std::vector<VoiceEvent> Feed(int64_t first_index, std::span<const int16_t> samples);
  std::vector<VoiceEvent> Finish();

  const Stats& stats() const { return stats_; }
  int64_t next_index() const { return next_index_; }

 private:
  std::vector<VoiceEvent> Complete(std::vector<Heard> heard);
  bool Quiet() const;

  const VoiceProfile* profile_;
  KeywordSpotter* spotter_;
  const SampleClock* clock_;
  Options options_;
  std::vector<int16_t> ring_;  // samples ring_first_, ...
  int64_t ring_first_ = 0;
  int64_t next_index_ = 0;
  bool started_ = false;
  std::deque<double> block_db_;  // 50 ms block energies, newest last
  double block_sum_ = 0;         // the block being summed
  int64_t block_fill_ = 0;
  Stats stats_;
};

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_VOICE_DETECTOR_H_

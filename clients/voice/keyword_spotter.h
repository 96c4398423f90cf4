// KeywordSpotter: pocketsphinx's keyphrase search (Debian's libpocketsphinx,
// the 5prealpha API with sphinxbase) over a stream of 16-bit mono samples,
// reporting each profile phrase it hears with its word segmentation in
// sample indices of the stream.
//
// How it runs the recogniser:
//  - keyword mode ("-kws"), one line per phrase; the search runs at each
//    phrase's threshold times `report_margin`, and the phrase's own threshold
//    is applied here, so --verbose can show near misses and their scores;
//  - the recogniser's own voice-activity detection is off
//    ("-remove_silence no"): it drops frames it takes for silence, which
//    clips soft onsets and breaks the frame → sample mapping; onsets are
//    found by onset.h instead. Cepstral mean normalisation is "live".
//  - one utterance runs for as long as the audio does: pocketsphinx numbers
//    a keyphrase's frames across utterances of one decoder in a way that is
//    not exactly the number of samples fed (frames are lost at utterance
//    boundaries), so instead of restarting utterances the spotter starts a
//    fresh decoder, whose frame 0 is a known sample, after `restart_after_s`
//    of audio at a quiet moment (or after `force_restart_after_s` in any
//    case) and at every gap in the audio. A frame is 1/100 s.
//  - a detection is final once the audio is `settle_s` past its end (the
//    search keeps improving an alignment while the phrase may still be
//    going on, and must have seen `-kws_delay` frames after it).
// Overlapping detections of different phrases are one utterance: the one
// furthest above its threshold wins, the others are reported as rejected.
//
// Not thread-safe: one thread feeds it.
#ifndef TICKMARK_CLIENTS_VOICE_KEYWORD_SPOTTER_H_
#define TICKMARK_CLIENTS_VOICE_KEYWORD_SPOTTER_H_

#include <cstddef>
#include <cstdint>
#include <map>
#include <memory>
#include <span>
#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "clients/voice/voice_profile.h"

namespace tickmark::voice {

inline constexpr int kModelSampleRate = 16000;

struct SpotterOptions {
  double report_margin = 1e-10;
  double settle_s = 0.25;
  double restart_after_s = 600;
  double force_restart_after_s = 1800;
};

// One phrase the recogniser heard, final.
struct Heard {
  size_t phrase = 0;  // index into VoiceProfile::phrases
  int64_t start = 0;  // recogniser's segmentation, sample indices
  int64_t end = 0;
  int64_t settled_at = 0;       // samples fed when it became final (one past the last)
  int32_t score = 0;            // pocketsphinx's detection score (higher: surer)
  int32_t threshold_score = 0;  // the phrase's threshold on the same scale
  bool accepted = false;
  std::string rejected_because;  // empty when accepted
};

// The score at which a keyphrase threshold lets a detection through, on the
// scale of ps_seg_prob: pocketsphinx compares the log ratio (base 1.0001,
// shifted right by 10 bits, SENSCR_SHIFT) with the threshold's log and
// reports the ratio minus 1500 (KWS_MAX) as the detection's score
// (pocketsphinx kws_search.c and sphinxbase logmath.c; checked against the
// library in tests/clients/voice/voice_spotter_test.cc).
int32_t ThresholdScore(double threshold);

class KeywordSpotter {
 public:
  // Loads the model and dictionary (the profile's, or the defaults). Errors:
  // NOT_FOUND for a missing model or dictionary (naming the Debian package),
  // INVALID_ARGUMENT for a word missing from the dictionary.
  static absl::StatusOr<std::unique_ptr<KeywordSpotter>> Create(const VoiceProfile& profile,
                                                                SpotterOptions options = {});
  ~KeywordSpotter();
  KeywordSpotter(const KeywordSpotter&) = delete;
  KeywordSpotter& operator=(const KeywordSpotter&) = delete;

  // Debian's pocketsphinx-en-us model and dictionary.
  static std::string DefaultModel();
  static std::string DefaultDictionary();

  // Feeds samples first_index, first_index+1, ...; a first_index other than
  // next_index() is a gap (pending phrases are finished, a fresh decoder
  // starts). `quiet`: the caller's judgement that nobody is speaking now,
  // when a decoder may be replaced. Returns the phrases that became final.
  std::vector<Heard> Feed(int64_t first_index, std::span<const int16_t> samples, bool quiet);
  // End of the audio: every pending phrase becomes final. A later Feed()
  // starts a fresh decoder.
  std::vector<Heard> Finish();

  int64_t next_index() const { return next_index_; }
  // Notes from loading (phrases of one syllable, ...), for the user.
  const std::vector<std::string>& warnings() const { return warnings_; }
  // Decoders started so far (the first included).
  int decoders_started() const { return decoders_started_; }

 private:
  struct Decoder;
  struct Candidate {
    size_t phrase;
    int64_t start, end;
    int32_t score;
  };
  KeywordSpotter(const VoiceProfile& profile, SpotterOptions options);
  absl::Status StartDecoder(int64_t base);
  void StopDecoder();
  void Collect();
  std::vector<Heard> Settle(bool all);

  std::vector<Phrase> phrases_;
  RecogniserSettings settings_;
  SpotterOptions options_;
  std::string model_;
  std::string dictionary_;
  std::vector<int32_t> threshold_scores_;
  std::map<std::string, size_t> phrase_index_;  // text -> index into phrases_
  std::unique_ptr<Decoder> decoder_;
  int64_t next_index_ = 0;
  std::vector<Candidate> pending_;
  // Every detection ending at or before this sample has been made final.
  int64_t settled_through_ = 0;
  std::vector<Heard> recent_;  // final ones of the last seconds, for dedup and overlaps
  std::vector<std::string> warnings_;
  int decoders_started_ = 0;
};

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_KEYWORD_SPOTTER_H_

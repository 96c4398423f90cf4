// Where tickmark-voice's audio comes from: an ALSA capture device
// (alsa_source.h), or a WAV stream or raw PCM on a file or a pipe (this
// file). Every source delivers mono 16-bit samples at the model's rate
// (16 kHz), numbered from 0, and says how sample numbers map to
// CLOCK_MONOTONIC:
//  - declared: the caller states when the first sample was captured (a
//    file recorded earlier, a test): --audio-start MONO_NS;
//  - ends now: the input ends at the moment it was opened (a recording just
//    finished): the first sample is that moment minus the input's length;
//  - live: the input arrives as it is recorded (a recorder piping into
//    stdin): each read() is a bound "these samples had been captured by
//    now", and SampleClock takes the lower envelope; the estimate is late by
//    at least the recorder's own buffering, which no reader can see;
//  - ALSA: the device's capture pointer with its monotonic timestamp.
//
// Not thread-safe: one thread reads a source.
#ifndef TICKMARK_CLIENTS_VOICE_AUDIO_SOURCE_H_
#define TICKMARK_CLIENTS_VOICE_AUDIO_SOURCE_H_

#include <cstdint>
#include <memory>
#include <optional>
#include <string>
#include <utility>
#include <vector>

#include "absl/status/statusor.h"
#include "server/core/time.h"

namespace tickmark::voice {

struct AudioBlock {
  int64_t first_index = 0;
  std::vector<int16_t> samples;
  // Timing pairs for SampleClock::Observe: (index, captured-by ns).
  std::vector<std::pair<int64_t, int64_t>> timing;
  bool gap = false;  // audio before these samples was lost: the clock starts over
  bool end = false;  // no more audio will come
  std::string note;  // something the user should know ("overrun: 0.2 s lost")
};

class AudioSource {
 public:
  virtual ~AudioSource() = default;
  // The next samples, waiting up to timeout_ms; an empty block when none
  // came in time. An error ends the source.
  virtual absl::StatusOr<AudioBlock> Read(int timeout_ms) = 0;
  // "WAV file rec.wav", "ALSA device default".
  virtual std::string Describe() const = 0;
  // True when audio arrives as it is captured (the recognition latency is
  // then measured against the clock, not the audio).
  virtual bool live() const = 0;
  // When the stream's first sample was captured, if the source knows it
  // without observations (declared, ends now).
  virtual std::optional<int64_t> declared_start_ns() const { return std::nullopt; }
};

enum class StreamFormat { kWav, kRaw };
enum class StreamTiming { kDeclared, kEndsNow, kLive };

struct StreamSourceOptions {
  std::string path;  // "-": stdin
  StreamFormat format = StreamFormat::kWav;
  StreamTiming timing = StreamTiming::kDeclared;
  int64_t start_ns = 0;  // for kDeclared
  size_t block_samples = kBlockSamples;
  static constexpr size_t kBlockSamples = 1600;  // 100 ms
};

// Opens a file or stdin; reads a WAV header at once. Errors name the file
// and the problem (a sample rate other than 16 kHz says how to convert).
// `clock`: for kEndsNow and kLive; not owned.
absl::StatusOr<std::unique_ptr<AudioSource>> OpenStreamSource(StreamSourceOptions options,
                                                              const MonotonicSource* clock);

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_AUDIO_SOURCE_H_

// WAV (RIFF WAVE) reading and writing for tickmark-voice: the header parser
// the file and stdin sources use, the conversion of any common PCM layout to
// the mono 16-bit samples the recogniser takes, and the writer --keep-audio
// uses.
//
// Accepted: format 1 (integer PCM, 8/16/24/32 bits), 3 (IEEE float, 32 bits)
// and 0xFFFE (WAVE_FORMAT_EXTENSIBLE with either sub-format), 1 to 8
// channels (averaged to mono). Chunks other than "fmt " and "data" are
// skipped. A data size of 0 or 0xFFFFFFFF (written by programs that stream
// to a pipe) means "until the end of the input".
//
// Pure functions, no I/O; the parser is tested by feeding bytes
// (docs/conventions.md habit 4). Thread-safe.
#ifndef TICKMARK_CLIENTS_VOICE_WAV_H_
#define TICKMARK_CLIENTS_VOICE_WAV_H_

#include <cstddef>
#include <cstdint>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/statusor.h"

namespace tickmark::voice {

struct WavFormat {
  enum class Encoding { kInteger, kFloat };
  Encoding encoding = Encoding::kInteger;
  uint16_t channels = 1;
  uint32_t sample_rate = 16000;
  uint16_t bits = 16;
  uint64_t data_offset = 0;            // where the samples start in the input
  std::optional<uint64_t> data_bytes;  // nullopt: until the end of the input

  size_t frame_bytes() const { return size_t{channels} * (bits / 8u); }
  // "16-bit integer PCM, 2 channels, 44100 Hz"
  std::string Describe() const;
};

// Parses the header at the start of `bytes`. OUT_OF_RANGE when `bytes` ends
// before the "data" chunk starts (read more and call again; a header longer
// than kMaxWavHeaderBytes is INVALID_ARGUMENT); INVALID_ARGUMENT, naming the
// problem, for anything that is not a WAV file this reader takes.
inline constexpr size_t kMaxWavHeaderBytes = 1 << 20;
absl::StatusOr<WavFormat> ParseWavHeader(std::string_view bytes);

// Appends the mono 16-bit samples of the whole frames in `data` (interleaved,
// in `format`) to `out`; returns how many bytes it used (a trailing partial
// frame is left for the next call). Floats are clipped to [-1, 1].
size_t AppendMono16(const WavFormat& format, std::string_view data, std::vector<int16_t>* out);

// A complete mono 16-bit PCM WAV file holding `samples`.
std::string EncodeWav(std::span<const int16_t> samples, uint32_t sample_rate);

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_WAV_H_

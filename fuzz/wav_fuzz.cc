// Fuzzes tickmark-voice's WAV reading (clients/voice/wav.h), which takes files
// and pipes a user names, and the onset search (clients/voice/onset.h) on
// whatever samples come out. Checks: a refusal is INVALID_ARGUMENT, or
// OUT_OF_RANGE only when the input is shorter than kMaxWavHeaderBytes and a
// longer input could complete it; an accepted header has 1-8 channels, a
// supported width and a data offset within the input; every prefix of an
// accepted header asks for more rather than failing differently; the
// conversion uses whole frames and yields one sample per frame; the onset
// lies at the recogniser's start or inside the audio.
#include <cstddef>
#include <cstdint>
#include <span>
#include <string_view>
#include <vector>

#include "absl/status/status.h"
#include "clients/voice/onset.h"
#include "clients/voice/wav.h"

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  using namespace tickmark::voice;
  const std::string_view bytes(reinterpret_cast<const char*>(data), size);
  auto f = ParseWavHeader(bytes);
  if (!f.ok()) {
    const auto code = f.status().code();
    if (code != absl::StatusCode::kInvalidArgument && code != absl::StatusCode::kOutOfRange) {
      __builtin_trap();
    }
    if (code == absl::StatusCode::kOutOfRange && size > kMaxWavHeaderBytes) __builtin_trap();
  } else {
    if (f->channels < 1 || f->channels > 8 || f->data_offset > size) __builtin_trap();
    if (f->bits != 8 && f->bits != 16 && f->bits != 24 && f->bits != 32) __builtin_trap();
    // A prefix is incomplete, never a different verdict.
    const size_t cut = static_cast<size_t>(f->data_offset) / 2;
    auto prefix = ParseWavHeader(bytes.substr(0, cut));
    if (!prefix.ok() && prefix.status().code() == absl::StatusCode::kInvalidArgument && cut >= 12) {
      __builtin_trap();
    }
    std::vector<int16_t> out;
    const std::string_view body = bytes.substr(static_cast<size_t>(f->data_offset));
    const size_t used = AppendMono16(*f, body, &out);
    if (used % f->frame_bytes() != 0 || used > body.size() ||
        body.size() - used >= f->frame_bytes() || out.size() != used / f->frame_bytes()) {
      __builtin_trap();
    }
  }
  // The onset search on the raw bytes as samples, with positions taken from
  // the first bytes (possibly far outside the audio).
  if (size >= 6) {
    std::vector<int16_t> samples((size - 6) / 2);
    for (size_t i = 0; i < samples.size(); ++i) {
      samples[i] = static_cast<int16_t>(data[6 + 2 * i] | (data[7 + 2 * i] << 8));
    }
    const int64_t first = (static_cast<int64_t>(data[0]) - 128) * 1000;
    const int64_t start = static_cast<int64_t>(data[1] | (data[2] << 8)) * 8;
    const int64_t end = start + static_cast<int64_t>(data[3] | (data[4] << 8));
    const int rate = 8000 + data[5] * 100;
    const Onset o = FindOnset(samples, first, start, end, rate);
    const int64_t last = first + static_cast<int64_t>(samples.size());
    if (o.method == OnsetMethod::kEnergy ? !(o.index >= first && o.index <= last)
                                         : o.index != start) {
      __builtin_trap();
    }
  }
  return 0;
}

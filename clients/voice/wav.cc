#include "clients/voice/wav.h"

#include <algorithm>
#include <cmath>
#include <cstring>

namespace tickmark::voice {
namespace {

// Little-endian fields (RIFF is little-endian throughout).
uint16_t U16(std::string_view b, size_t at) {
  return static_cast<uint16_t>(static_cast<uint8_t>(b[at]) |
                               (static_cast<uint16_t>(static_cast<uint8_t>(b[at + 1])) << 8));
}
uint32_t U32(std::string_view b, size_t at) {
  return static_cast<uint32_t>(U16(b, at)) | (static_cast<uint32_t>(U16(b, at + 2)) << 16);
}
void Put16(std::string* s, uint16_t v) {
  s->push_back(static_cast<char>(v & 0xff));
  s->push_back(static_cast<char>(v >> 8));
}
void Put32(std::string* s, uint32_t v) {
  Put16(s, static_cast<uint16_t>(v & 0xffff));
  Put16(s, static_cast<uint16_t>(v >> 16));
}

constexpr uint16_t kFormatPcm = 1;
constexpr uint16_t kFormatFloat = 3;
constexpr uint16_t kFormatExtensible = 0xFFFE;

absl::Status Bad(const std::string& what) {
  return absl::InvalidArgumentError("not a WAV file this program reads: " + what);
}

absl::Status ParseFmt(std::string_view c, WavFormat* f) {
  if (c.size() < 16) return Bad("the fmt chunk is shorter than 16 bytes");
  uint16_t tag = U16(c, 0);
  f->channels = U16(c, 2);
  f->sample_rate = U32(c, 4);
  const uint16_t block_align = U16(c, 12);
  f->bits = U16(c, 14);
  if (tag == kFormatExtensible) {
    // WAVEFORMATEXTENSIBLE: cbSize (2), valid bits (2), channel mask (4),
    // then the sub-format GUID whose first two bytes are the format tag.
    if (c.size() < 40) return Bad("the extensible fmt chunk is shorter than 40 bytes");
    tag = U16(c, 24);
  }
  if (tag == kFormatPcm) {
    f->encoding = WavFormat::Encoding::kInteger;
    if (f->bits != 8 && f->bits != 16 && f->bits != 24 && f->bits != 32) {
      return Bad("integer PCM of " + std::to_string(f->bits) + " bits (8, 16, 24 or 32 are read)");
    }
  } else if (tag == kFormatFloat) {
    f->encoding = WavFormat::Encoding::kFloat;
    if (f->bits != 32)
      return Bad("float samples of " + std::to_string(f->bits) + " bits (32 are read)");
  } else {
    return Bad("format tag " + std::to_string(tag) +
               " (compressed audio; convert it: sox IN -b 16 -e signed OUT.wav)");
  }
  if (f->channels < 1 || f->channels > 8) {
    return Bad(std::to_string(f->channels) + " channels (1 to 8 are read)");
  }
  if (f->sample_rate < 1000 || f->sample_rate > 384000) {
    return Bad("sample rate " + std::to_string(f->sample_rate) + " Hz");
  }
  if (block_align != f->frame_bytes()) {
    return Bad("block align " + std::to_string(block_align) + " differs from channels x bytes (" +
               std::to_string(f->frame_bytes()) + ")");
  }
  return absl::OkStatus();
}

}  // namespace

std::string WavFormat::Describe() const {
  return std::to_string(bits) + "-bit " + (encoding == Encoding::kFloat ? "float" : "integer PCM") +
         ", " + std::to_string(channels) + (channels == 1 ? " channel, " : " channels, ") +
         std::to_string(sample_rate) + " Hz";
}

absl::StatusOr<WavFormat> ParseWavHeader(std::string_view bytes) {
  const absl::Status need_more = absl::OutOfRangeError("the WAV header is incomplete");
  if (bytes.size() < 12) {
    // Say "not a WAV file" as early as the bytes allow.
    const std::string_view riff = "RIFF";
    if (bytes.substr(0, std::min<size_t>(4, bytes.size())) !=
        riff.substr(0, std::min<size_t>(4, bytes.size()))) {
      return Bad("it does not start with RIFF");
    }
    return need_more;
  }
  if (bytes.substr(0, 4) != "RIFF") return Bad("it does not start with RIFF");
  if (bytes.substr(8, 4) != "WAVE") return Bad("the RIFF form is not WAVE");
  WavFormat f;
  bool have_fmt = false;
  size_t at = 12;
  while (true) {
    if (at > kMaxWavHeaderBytes) return Bad("no data chunk in the first 1 MiB");
    if (bytes.size() < at + 8) return need_more;
    const std::string_view id = bytes.substr(at, 4);
    const uint32_t size = U32(bytes, at + 4);
    const size_t body = at + 8;
    if (id == "data") {
      if (!have_fmt) return Bad("the data chunk comes before the fmt chunk");
      f.data_offset = body;
      if (size != 0 && size != 0xFFFFFFFFu) f.data_bytes = size;
      return f;
    }
    // Chunks are padded to an even size (RIFF).
    const uint64_t next = uint64_t{body} + size + (size & 1u);
    if (id == "fmt ") {
      if (size > 4096) return Bad("a fmt chunk of " + std::to_string(size) + " bytes");
      if (bytes.size() < body + size) return need_more;
      if (absl::Status s = ParseFmt(bytes.substr(body, size), &f); !s.ok()) return s;
      have_fmt = true;
    }
    if (next > kMaxWavHeaderBytes) return Bad("no data chunk in the first 1 MiB");
    at = static_cast<size_t>(next);
  }
}

size_t AppendMono16(const WavFormat& format, std::string_view data, std::vector<int16_t>* out) {
  const size_t frame = format.frame_bytes();
  if (frame == 0) return 0;
  const size_t frames = data.size() / frame;
  const size_t width = format.bits / 8u;
  out->reserve(out->size() + frames);
  for (size_t i = 0; i < frames; ++i) {
    double sum = 0;  // in units of full scale
    for (size_t c = 0; c < format.channels; ++c) {
      const size_t at = i * frame + c * width;
      double v = 0;
      if (format.encoding == WavFormat::Encoding::kFloat) {
        const uint32_t bitsv = U32(data, at);
        float fl;
        std::memcpy(&fl, &bitsv, sizeof fl);
        v = std::isfinite(fl) ? std::clamp(static_cast<double>(fl), -1.0, 1.0) : 0.0;
      } else if (width == 1) {
        v = (static_cast<double>(static_cast<uint8_t>(data[at])) - 128.0) / 128.0;  // unsigned
      } else {
        // Sign-extend the top `width` bytes into an int32.
        uint32_t u = 0;
        for (size_t b = 0; b < width; ++b) {
          u |= static_cast<uint32_t>(static_cast<uint8_t>(data[at + b])) << (8 * (b + 4 - width));
        }
        v = static_cast<double>(static_cast<int32_t>(u)) / 2147483648.0;
      }
      sum += v;
    }
    const double mono = sum / format.channels * 32768.0;
    out->push_back(static_cast<int16_t>(std::clamp(std::lround(mono), -32768L, 32767L)));
  }
  return frames * frame;
}

std::string EncodeWav(std::span<const int16_t> samples, uint32_t sample_rate) {
  const uint32_t data_bytes = static_cast<uint32_t>(samples.size() * 2);
  std::string s;
  s.reserve(44 + data_bytes);
  s += "RIFF";
  Put32(&s, 36 + data_bytes);
  s += "WAVEfmt ";
  Put32(&s, 16);
  Put16(&s, kFormatPcm);
  Put16(&s, 1);  // channels
  Put32(&s, sample_rate);
  Put32(&s, sample_rate * 2);  // bytes per second
  Put16(&s, 2);                // block align
  Put16(&s, 16);               // bits
  s += "data";
  Put32(&s, data_bytes);
  for (int16_t v : samples) Put16(&s, static_cast<uint16_t>(v));
  return s;
}

}  // namespace tickmark::voice

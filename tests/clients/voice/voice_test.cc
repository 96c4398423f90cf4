// tickmark-voice's pure parts, fed bytes and samples: profiles, WAV parsing
// and writing, the onset search, the sample clock.
#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <cmath>
#include <cstdint>
#include <random>
#include <string>
#include <vector>

#include "clients/voice/onset.h"
#include "clients/voice/sample_clock.h"
#include "clients/voice/voice_profile.h"
#include "clients/voice/wav.h"

namespace tickmark::voice {
namespace {

using ::testing::HasSubstr;

// --- profiles ---

TEST(VoiceProfileTest, ParsesPhrasesWithDefaults) {
  auto p = ParseVoiceProfile(R"(
name = "t"
[recogniser]
threshold = 1e-30
max_phrase_s = 1.5
[[phrase]]
text = "  Good   JOB "
value = 1
label = "approve"
[[phrase]]
text = "not like that"
value = -0.5
threshold = 1e-12
)",
                             "t.toml");
  ASSERT_TRUE(p.ok()) << p.status();
  ASSERT_EQ(p->phrases.size(), 2u);
  EXPECT_EQ(p->phrases[0].text, "good job");
  EXPECT_EQ(p->phrases[0].threshold, 1e-30);  // the [recogniser] default
  EXPECT_EQ(p->phrases[1].threshold, 1e-12);
  EXPECT_EQ(p->phrases[1].label, "-0.5");
  EXPECT_EQ(p->recogniser.max_phrase_s, 1.5);
  EXPECT_EQ(p->Legend(), "\"good job\" approve  \"not like that\" -0.5");
}

TEST(VoiceProfileTest, ErrorsNameFileLineAndColumn) {
  auto bad = [](const std::string& text) {
    auto p = ParseVoiceProfile(text, "p.toml");
    EXPECT_FALSE(p.ok());
    return std::string(p.status().message());
  };
  EXPECT_THAT(bad("[[phrase]]\ntext = \"ok go\"\nvalue = 1\nfoo = 2\n"),
              HasSubstr("p.toml:4:1: phrase 1: unknown field \"foo\""));
  EXPECT_THAT(bad("[[phrase]]\nvalue = 1\n"), HasSubstr("needs text"));
  EXPECT_THAT(bad("[[phrase]]\ntext = \"ok go\"\n"), HasSubstr("needs a value"));
  EXPECT_THAT(bad("[[phrase]]\ntext = \"ok go\"\nvalue = \"one\"\n"),
              HasSubstr("must be a number"));
  EXPECT_THAT(bad("[[phrase]]\ntext = \"ok go\"\nvalue = nan\n"), HasSubstr("finite"));
  EXPECT_THAT(bad("[[phrase]]\ntext = \"ok go\"\nvalue = 1\nthreshold = -1\n"),
              HasSubstr("threshold must be within"));
  EXPECT_THAT(bad("[[phrase]]\ntext = \"ok-go\"\nvalue = 1\n"), HasSubstr("not '-'"));
  EXPECT_THAT(bad("[[phrase]]\ntext = \"   \"\nvalue = 1\n"), HasSubstr("at least one word"));
  EXPECT_THAT(bad("[[phrase]]\ntext = \"this phrase is far too long to fit\"\nvalue = 1\n"),
              HasSubstr("longer than 28"));
  EXPECT_THAT(bad("[recogniser]\nmax_phrase_s = 20\n[[phrase]]\ntext = \"a b\"\nvalue = 1\n"),
              HasSubstr("max_phrase_s must be within"));
  EXPECT_THAT(bad("[recogniser]\nspeed = 2\n[[phrase]]\ntext = \"a b\"\nvalue = 1\n"),
              HasSubstr("unknown field \"recogniser.speed\""));
  EXPECT_THAT(bad("colour = 1\n"), HasSubstr("unknown field \"colour\""));
  EXPECT_THAT(bad("name = \"x\"\n"), HasSubstr("no [[phrase]] tables"));
  EXPECT_THAT(bad("[[phrase]\n"), HasSubstr("p.toml:1:"));
}

TEST(VoiceProfileTest, ShippedProfilesLoad) {
  for (const char* name : {"en-basic.toml", "en-graded.toml"}) {
    auto p = LoadVoiceProfile(std::string(TICKMARK_SOURCE_DIR) + "/clients/voice/profiles/" + name);
    ASSERT_TRUE(p.ok()) << name << ": " << p.status();
    bool approve = false, disapprove = false;
    for (const Phrase& ph : p->phrases) {
      approve |= ph.value > 0;
      disapprove |= ph.value < 0;
      // "voice:" + phrase + " onset=recogniser lat=99999ms" fits 64 bytes.
      EXPECT_LE(6 + ph.text.size() + 17 + 12, 64u) << ph.text;
    }
    EXPECT_TRUE(approve && disapprove) << name;
  }
}

// --- WAV ---

std::string Le16(uint16_t v) { return {static_cast<char>(v & 0xff), static_cast<char>(v >> 8)}; }
std::string Le32(uint32_t v) { return Le16(v & 0xffff) + Le16(static_cast<uint16_t>(v >> 16)); }

std::string Header(uint16_t tag, uint16_t channels, uint32_t rate, uint16_t bits,
                   uint32_t data_bytes, const std::string& extra_chunk = "") {
  std::string fmt = Le16(tag) + Le16(channels) + Le32(rate) + Le32(rate * channels * bits / 8) +
                    Le16(static_cast<uint16_t>(channels * bits / 8)) + Le16(bits);
  std::string body = "WAVE" + extra_chunk + "fmt " + Le32(static_cast<uint32_t>(fmt.size())) + fmt +
                     "data" + Le32(data_bytes);
  return "RIFF" + Le32(static_cast<uint32_t>(body.size() + data_bytes)) + body;
}

TEST(WavTest, EncodeThenParseRoundTrips) {
  const std::vector<int16_t> s = {0, 1, -1, 32767, -32768, 1234};
  const std::string wav = EncodeWav(s, 16000);
  EXPECT_EQ(wav.size(), 44u + 12u);  // the canonical 44-byte header (RIFF WAVE, common practice)
  auto f = ParseWavHeader(wav);
  ASSERT_TRUE(f.ok()) << f.status();
  EXPECT_EQ(f->sample_rate, 16000u);
  EXPECT_EQ(f->data_offset, 44u);
  ASSERT_TRUE(f->data_bytes.has_value());
  std::vector<int16_t> back;
  EXPECT_EQ(AppendMono16(*f, std::string_view(wav).substr(44), &back), 12u);
  EXPECT_EQ(back, s);
}

TEST(WavTest, SkipsOtherChunksWithPadding) {
  // A LIST chunk of odd size is padded to an even length (RIFF).
  const std::string list = "LIST" + Le32(3) + std::string("abc") + std::string(1, '\0');
  auto f = ParseWavHeader(Header(1, 1, 16000, 16, 0, list));
  ASSERT_TRUE(f.ok()) << f.status();
  EXPECT_FALSE(f->data_bytes.has_value());  // 0: until the end (a stream)
}

TEST(WavTest, IncompleteHeaderAsksForMore) {
  const std::string h = Header(1, 1, 16000, 16, 100);
  for (size_t n : {0ul, 3ul, 11ul, 20ul, h.size() - 1}) {
    EXPECT_TRUE(absl::IsOutOfRange(ParseWavHeader(h.substr(0, n)).status())) << n;
  }
  EXPECT_TRUE(ParseWavHeader(h).ok());
}

TEST(WavTest, RefusesWhatItCannotRead) {
  auto msg = [](const std::string& bytes) {
    return std::string(ParseWavHeader(bytes).status().message());
  };
  EXPECT_THAT(msg("OggS........"), HasSubstr("does not start with RIFF"));
  EXPECT_THAT(msg(std::string("RIFF\0\0\0\0AVI LIST", 16)), HasSubstr("not WAVE"));
  EXPECT_THAT(msg(Header(85, 1, 16000, 16, 10)), HasSubstr("format tag 85"));  // MP3 in WAV
  EXPECT_THAT(msg(Header(1, 1, 16000, 12, 10)), HasSubstr("12 bits"));
  EXPECT_THAT(msg(Header(3, 1, 16000, 64, 10)), HasSubstr("float samples of 64 bits"));
  EXPECT_THAT(msg(Header(1, 0, 16000, 16, 10)), HasSubstr("0 channels"));
  EXPECT_THAT(msg(Header(1, 1, 10, 16, 10)), HasSubstr("sample rate 10 Hz"));
  const std::string data_first = std::string("RIFF") + Le32(100) + "WAVEdata" + Le32(4);
  EXPECT_THAT(msg(data_first), HasSubstr("before the fmt chunk"));
}

TEST(WavTest, ConvertsLayoutsToMono16) {
  std::vector<int16_t> out;
  // 8-bit unsigned: 128 is zero, 255 is just under full scale.
  WavFormat u8{WavFormat::Encoding::kInteger, 1, 16000, 8, 0, std::nullopt};
  AppendMono16(u8, std::string("\x80\xff\x00", 3), &out);
  EXPECT_EQ(out, (std::vector<int16_t>{0, 32512, -32768}));
  // 24-bit stereo: left +0.5, right -0.5 average to 0; then both 0.25.
  out.clear();
  WavFormat s24{WavFormat::Encoding::kInteger, 2, 16000, 24, 0, std::nullopt};
  const std::string frames = std::string("\x00\x00\x40", 3) + std::string("\x00\x00\xc0", 3) +
                             std::string("\x00\x00\x20", 3) + std::string("\x00\x00\x20", 3) +
                             std::string("\x00\x00", 2);  // a partial frame stays
  EXPECT_EQ(AppendMono16(s24, frames, &out), 12u);
  EXPECT_EQ(out, (std::vector<int16_t>{0, 8192}));
  // 32-bit float, clipped beyond full scale.
  out.clear();
  WavFormat f32{WavFormat::Encoding::kFloat, 1, 16000, 32, 0, std::nullopt};
  float v[3] = {0.5f, 2.0f, -1.0f};
  AppendMono16(f32, std::string(reinterpret_cast<const char*>(v), sizeof v), &out);
  EXPECT_EQ(out, (std::vector<int16_t>{16384, 32767, -32768}));
}

TEST(WavTest, ExtensibleFormatIsRead) {
  // WAVE_FORMAT_EXTENSIBLE: cbSize 22, valid bits, channel mask, then the
  // sub-format GUID starting with the format tag (1 = PCM).
  std::string fmt = Le16(0xFFFE) + Le16(1) + Le32(16000) + Le32(32000) + Le16(2) + Le16(16) +
                    Le16(22) + Le16(16) + Le32(4) + Le16(1) + std::string(14, '\x01');
  std::string body = "WAVEfmt " + Le32(static_cast<uint32_t>(fmt.size())) + fmt + "data" + Le32(2);
  auto f = ParseWavHeader("RIFF" + Le32(static_cast<uint32_t>(body.size() + 2)) + body);
  ASSERT_TRUE(f.ok()) << f.status();
  EXPECT_EQ(f->encoding, WavFormat::Encoding::kInteger);
}

// --- onset ---

// Noise, then a tone burst starting at `at` (a sample index), rising over
// `rise` samples to `level` (RMS ratio to the noise).
std::vector<int16_t> Burst(size_t n, size_t at, double noise_rms, double level, size_t rise,
                           uint32_t seed) {
  std::mt19937 rng(seed);
  std::normal_distribution<double> g(0, noise_rms);
  std::vector<int16_t> s(n);
  for (size_t i = 0; i < n; ++i) {
    double v = g(rng);
    if (i >= at) {
      const double ramp = std::min(1.0, static_cast<double>(i - at) / static_cast<double>(rise));
      v += ramp * level * noise_rms * std::sqrt(2.0) *
           std::sin(2 * M_PI * 220 * static_cast<double>(i) / 16000);
    }
    s[i] = static_cast<int16_t>(std::clamp(v, -32768.0, 32767.0));
  }
  return s;
}

TEST(OnsetTest, FindsABurstStartInNoise) {
  // 20 dB above the noise, reached within 5 ms: found within 10 ms.
  const auto s = Burst(48000, 24000, 100, 10, 80, 1);
  for (int64_t recogniser : {24000 - 3000, 24000, 24000 + 2000}) {
    const Onset o = FindOnset(s, 0, recogniser, 36000, 16000);
    EXPECT_EQ(o.method, OnsetMethod::kEnergy) << o.why;
    EXPECT_NEAR(static_cast<double>(o.index), 24000, 160) << recogniser;
  }
}

TEST(OnsetTest, NumberingFollowsFirstIndex) {
  const auto s = Burst(48000, 24000, 100, 10, 80, 2);
  const int64_t base = 1'000'000'007;
  const Onset o = FindOnset(s, base, base + 24000, base + 36000, 16000);
  EXPECT_NEAR(static_cast<double>(o.index - base), 24000, 160);
}

TEST(OnsetTest, KeepsTheRecogniserWhenItCannotTell) {
  // Pure noise: no rise.
  const auto noise = Burst(48000, 48000, 100, 0, 1, 3);
  Onset o = FindOnset(noise, 0, 24000, 36000, 16000);
  EXPECT_EQ(o.method, OnsetMethod::kRecogniser);
  EXPECT_EQ(o.index, 24000);
  EXPECT_THAT(o.why, HasSubstr("no clear rise"));
  // Sound all the way from before the search window: joined to earlier sound.
  const auto joined = Burst(48000, 18100, 100, 10, 80, 4);
  o = FindOnset(joined, 0, 24000, 36000, 16000);
  EXPECT_EQ(o.method, OnsetMethod::kRecogniser);
  EXPECT_THAT(o.why, HasSubstr("joined"));
  // Too little audio before the phrase for a floor.
  o = FindOnset(Burst(16000, 4000, 100, 10, 80, 5), 0, 4000, 8000, 16000);
  EXPECT_EQ(o.method, OnsetMethod::kRecogniser);
  // No audio at all around it.
  o = FindOnset(std::vector<int16_t>(100), 0, 50000, 60000, 16000);
  EXPECT_EQ(o.method, OnsetMethod::kRecogniser);
}

// A regression (found by fuzz/wav_fuzz.cc): a search window lying past the
// audio read the floor frames beyond the end. Any positions must be safe.
TEST(OnsetTest, AnyPositionsAreSafe) {
  const auto s = Burst(9000, 6000, 100, 10, 80, 6);
  for (int64_t first : {int64_t{-50000}, int64_t{0}, int64_t{7000}}) {
    for (int64_t start = first - 20000; start < first + 30000; start += 997) {
      for (int64_t len : {int64_t{0}, int64_t{160}, int64_t{9000}}) {
        const Onset o = FindOnset(s, first, start, start + len, 16000);
        if (o.method == OnsetMethod::kEnergy) {
          EXPECT_GE(o.index, first);
          EXPECT_LE(o.index, first + 9000);
        } else {
          EXPECT_EQ(o.index, start);
        }
      }
    }
  }
}

// --- sample clock ---

TEST(SampleClockTest, DeclaredStartIsExact) {
  SampleClock c(16000);
  EXPECT_FALSE(c.TimeOf(0).has_value());
  c.Declare(5'000'000'000);
  EXPECT_EQ(*c.TimeOf(0), 5'000'000'000);
  EXPECT_EQ(*c.TimeOf(16000), 6'000'000'000);
  EXPECT_EQ(*c.TimeOf(1), 5'000'062'500);
  c.Observe(10, 1);  // ignored once declared
  EXPECT_EQ(*c.TimeOf(16000), 6'000'000'000);
}

// A card whose clock runs `ppm` fast against the host, read every 20 ms with
// a late, one-sided delay of up to 2 ms (and one read in ten exact).
void Simulate(SampleClock* c, double ppm, int64_t start_ns, double seconds, int64_t* truth_at) {
  std::mt19937 rng(7);
  std::uniform_real_distribution<double> late(0, 2e6);
  const double period = 1e9 / 16000 / (1 + ppm * 1e-6);  // host ns per card sample
  for (int64_t i = 319; i < static_cast<int64_t>(seconds * 16000); i += 320) {
    const double t = static_cast<double>(start_ns) + static_cast<double>(i) * period;
    const double d = (i / 320) % 10 == 0 ? 0 : late(rng);
    c->Observe(i, static_cast<int64_t>(t + d));
  }
  *truth_at = start_ns;
}

TEST(SampleClockTest, LowerEnvelopeRemovesLateReadsAndFitsDrift) {
  for (double ppm : {0.0, 80.0, -150.0}) {
    SampleClock c(16000);
    int64_t start = 0;
    Simulate(&c, ppm, 1'000'000'000'000, 300, &start);
    const double period = 1e9 / 16000 / (1 + ppm * 1e-6);
    for (int64_t i : {int64_t{16000} * 100, int64_t{16000} * 299, int64_t{16000} * 310}) {
      const double truth = static_cast<double>(start) + static_cast<double>(i) * period;
      // Within 50 µs, against 2 ms of read jitter and up to 46 ms of drift.
      EXPECT_NEAR(static_cast<double>(*c.TimeOf(i)), truth, 5e4) << ppm << " " << i;
    }
    EXPECT_NEAR(c.fitted_ppm(), ppm, 2) << ppm;
  }
}

TEST(SampleClockTest, NominalRateUntilEnoughSpanThenReset) {
  SampleClock c(16000);
  c.Observe(15999, 2'000'000'000);  // sample 15999 captured by 2 s
  c.Observe(31999, 3'000'500'000);  // a late read
  EXPECT_EQ(*c.TimeOf(15999), 2'000'000'000);
  EXPECT_EQ(*c.TimeOf(31999), 3'000'000'000);
  EXPECT_EQ(c.fitted_ppm(), 0);
  c.Reset();
  EXPECT_FALSE(c.TimeOf(0).has_value());
  // The same pointer seen twice keeps the earlier time.
  c.Observe(100, 5'000'000'000);
  c.Observe(100, 4'999'000'000);
  c.Observe(50, 1);  // older indices are ignored
  EXPECT_EQ(*c.TimeOf(100), 4'999'000'000);
}

TEST(SampleClockTest, AbsurdDriftIsClamped) {
  SampleClock c(16000);
  // Reads claiming the card runs 10% fast: the fit stops at 500 ppm.
  for (int64_t i = 0; i < 16000 * 30; i += 1600) {
    c.Observe(i, static_cast<int64_t>(static_cast<double>(i) * 62500 / 1.1));
  }
  EXPECT_NEAR(c.fitted_ppm(), 500, 1e-6);
}

}  // namespace
}  // namespace tickmark::voice

// KeywordSpotter against pocketsphinx itself, on a phrase spoken by flite
// (Debian's flite and sox are run at test time; ./run installs them).
#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <stdio.h>
#include <stdlib.h>
#include <unistd.h>

#include <cmath>
#include <filesystem>
#include <fstream>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "clients/voice/keyword_spotter.h"
#include "clients/voice/voice_profile.h"
#include "clients/voice/wav.h"

namespace tickmark::voice {
namespace {

using ::testing::HasSubstr;

// "excellent" spoken by flite's slt voice, 16 kHz mono, leading silence cut.
std::vector<int16_t> Spoken(const std::string& text) {
  char dir[] = "/tmp/tickmark-spotter-XXXXXX";
  EXPECT_NE(mkdtemp(dir), nullptr);
  const std::string d = dir;
  const std::string cmd = "flite -voice slt -t '" + text + "' -o " + d + "/a.wav && sox " + d +
                          "/a.wav -r 16000 -c 1 -b 16 " + d + "/b.wav silence 1 0.005 1%";
  EXPECT_EQ(std::system(cmd.c_str()), 0) << "needs flite and sox (./run installs them)";
  std::ifstream in(d + "/b.wav", std::ios::binary);
  std::stringstream ss;
  ss << in.rdbuf();
  std::filesystem::remove_all(d);
  const std::string bytes = ss.str();
  std::vector<int16_t> out;
  auto f = ParseWavHeader(bytes);
  EXPECT_TRUE(f.ok()) << f.status();
  if (f.ok()) AppendMono16(*f, std::string_view(bytes).substr(f->data_offset), &out);
  return out;
}

// 2 s of quiet noise, the phrase, 1 s of noise.
std::vector<int16_t> Scene(const std::vector<int16_t>& phrase) {
  std::mt19937 rng(3);
  std::normal_distribution<double> g(0, 30);
  std::vector<int16_t> s(32000 + phrase.size() + 16000);
  for (size_t i = 0; i < s.size(); ++i) {
    double v = g(rng) + (i >= 32000 && i < 32000 + phrase.size() ? phrase[i - 32000] : 0);
    s[i] = static_cast<int16_t>(std::clamp(v, -32768.0, 32767.0));
  }
  return s;
}

VoiceProfile Profile(const std::string& text, double threshold) {
  VoiceProfile p;
  p.phrases.push_back({text, 1.0, threshold, "+1"});
  return p;
}

std::vector<Heard> Listen(KeywordSpotter& k, const std::vector<int16_t>& s, size_t block,
                          int64_t first = 0, size_t quiet_until = 0) {
  std::vector<Heard> out;
  for (size_t i = 0; i < s.size(); i += block) {
    const size_t n = std::min(block, s.size() - i);
    auto h = k.Feed(first + static_cast<int64_t>(i), std::span<const int16_t>(s).subspan(i, n),
                    i + n <= quiet_until);
    out.insert(out.end(), h.begin(), h.end());
  }
  auto h = k.Finish();
  out.insert(out.end(), h.begin(), h.end());
  return out;
}

class SpotterTest : public ::testing::Test {
 protected:
  static void SetUpTestSuite() { scene_ = new std::vector<int16_t>(Scene(Spoken("excellent"))); }
  static void TearDownTestSuite() { delete scene_; }
  static const std::vector<int16_t>& scene() { return *scene_; }
  static std::vector<int16_t>* scene_;
};
std::vector<int16_t>* SpotterTest::scene_ = nullptr;

TEST_F(SpotterTest, HearsThePhraseWhereItWasSaid) {
  auto k = KeywordSpotter::Create(Profile("excellent", 1e-30));
  ASSERT_TRUE(k.ok()) << k.status();
  auto heard = Listen(**k, scene(), 1600);
  ASSERT_EQ(heard.size(), 1u);
  EXPECT_TRUE(heard[0].accepted);
  EXPECT_NEAR(static_cast<double>(heard[0].start), 32000, 1600);  // the recogniser's own start
  EXPECT_GT(heard[0].end, heard[0].start);
}

// The threshold scale of ThresholdScore is pocketsphinx's: with the phrase's
// threshold handed to the library itself (report_margin 1), a threshold whose
// score equals the detection's score lets it through and one a step above
// does not.
TEST_F(SpotterTest, ThresholdScoreIsTheLibrarysScale) {
  auto probe = KeywordSpotter::Create(Profile("excellent", 1e-30));
  ASSERT_TRUE(probe.ok());
  auto heard = Listen(**probe, scene(), 1600);
  ASSERT_EQ(heard.size(), 1u);
  const int32_t score = heard[0].score;
  auto threshold_for = [](int32_t s) {
    // Middle of the 1024-wide bucket that ThresholdScore maps to s.
    const double t = std::exp((static_cast<double>(s + 1500) * 1024 + 512) * std::log(1.0001));
    EXPECT_EQ(ThresholdScore(t), s);
    return t;
  };
  SpotterOptions strict;
  strict.report_margin = 1;
  auto at = KeywordSpotter::Create(Profile("excellent", threshold_for(score)), strict);
  ASSERT_TRUE(at.ok());
  auto passed = Listen(**at, scene(), 1600);
  ASSERT_EQ(passed.size(), 1u);
  EXPECT_TRUE(passed[0].accepted);
  EXPECT_EQ(passed[0].score, score);
  auto above = KeywordSpotter::Create(Profile("excellent", threshold_for(score + 1)), strict);
  ASSERT_TRUE(above.ok());
  EXPECT_TRUE(Listen(**above, scene(), 1600).empty());
  // With the default margin it is seen, and reported as below its threshold.
  auto margin = KeywordSpotter::Create(Profile("excellent", threshold_for(score + 1)));
  ASSERT_TRUE(margin.ok());
  auto near = Listen(**margin, scene(), 1600);
  ASSERT_EQ(near.size(), 1u);
  EXPECT_FALSE(near[0].accepted);
  EXPECT_EQ(near[0].rejected_because, "below its threshold");
}

// Block sizes, fresh decoders at quiet moments and a numbering that does not
// start at 0 leave the phrase's samples where they were: a fresh decoder's
// frame 0 is the sample it started at (keyword_spotter.h).
TEST_F(SpotterTest, SampleNumbersSurviveBlocksRestartsAndOffsets) {
  auto base = KeywordSpotter::Create(Profile("excellent", 1e-30));
  ASSERT_TRUE(base.ok());
  const Heard ref = Listen(**base, scene(), 1600).at(0);
  SpotterOptions restarting;
  restarting.restart_after_s = 0.5;
  auto k = KeywordSpotter::Create(Profile("excellent", 1e-30), restarting);
  ASSERT_TRUE(k.ok());
  const int64_t offset = 987'654'321;
  auto heard = Listen(**k, scene(), 1000, offset, 30000);
  ASSERT_EQ(heard.size(), 1u);
  EXPECT_GE((*k)->decoders_started(), 3);
  // The same frames, give or take what CMN state changes in the alignment.
  EXPECT_NEAR(static_cast<double>(heard[0].start - offset), static_cast<double>(ref.start),
              3 * 160);
  EXPECT_NEAR(static_cast<double>(heard[0].end - offset), static_cast<double>(ref.end), 3 * 160);
}

TEST_F(SpotterTest, AGapStartsAFreshDecoder) {
  auto k = KeywordSpotter::Create(Profile("excellent", 1e-30));
  ASSERT_TRUE(k.ok());
  std::vector<int16_t> first(scene().begin(), scene().begin() + 16000);
  Listen(**k, first, 1600);
  const int64_t later = 5'000'000;
  auto heard = Listen(**k, scene(), 1600, later);
  ASSERT_EQ(heard.size(), 1u);
  EXPECT_NEAR(static_cast<double>(heard[0].start - later), 32000, 1600);
  EXPECT_EQ((*k)->decoders_started(), 2);
}

TEST(SpotterCreateTest, ExplainsWhatIsMissing) {
  auto k = KeywordSpotter::Create(Profile("excellent xyzzyq", 1e-30));
  ASSERT_FALSE(k.ok());
  EXPECT_TRUE(absl::IsInvalidArgument(k.status()));
  EXPECT_THAT(k.status().message(), HasSubstr("\"xyzzyq\" is not in the dictionary"));
  VoiceProfile p = Profile("excellent", 1e-30);
  p.recogniser.model = "/nonexistent";
  k = KeywordSpotter::Create(p);
  EXPECT_TRUE(absl::IsNotFound(k.status()));
  EXPECT_THAT(k.status().message(), HasSubstr("pocketsphinx-en-us"));
  auto one = KeywordSpotter::Create(Profile("yes", 1e-30));
  ASSERT_TRUE(one.ok());
  ASSERT_EQ((*one)->warnings().size(), 1u);
  EXPECT_THAT((*one)->warnings()[0], HasSubstr("1 syllable"));
}

}  // namespace
}  // namespace tickmark::voice

#include "clients/voice/onset.h"

#include <algorithm>
#include <cmath>
#include <vector>

#include "clients/voice/sample_clock.h"

namespace tickmark::voice {
namespace {

double Percentile(std::vector<double> v, double p) {
  // Linear interpolation between closest ranks (numpy's default).
  std::sort(v.begin(), v.end());
  const double pos = p / 100.0 * static_cast<double>(v.size() - 1);
  const size_t lo = static_cast<size_t>(std::floor(pos));
  const size_t hi = std::min(lo + 1, v.size() - 1);
  return v[lo] + (v[hi] - v[lo]) * (pos - static_cast<double>(lo));
}

}  // namespace

const char* OnsetMethodName(OnsetMethod m) {
  return m == OnsetMethod::kEnergy ? "energy" : "recogniser";
}

Onset FindOnset(std::span<const int16_t> audio, int64_t first_index, int64_t start, int64_t end,
                int sample_rate, const OnsetOptions& o) {
  Onset out;
  out.index = start;
  const double rate = sample_rate;
  const int64_t hop = std::max<int64_t>(1, Round(o.hop_s * rate));
  const int64_t win = std::max<int64_t>(hop, Round(o.window_s * rate));
  const int64_t audio_end = first_index + static_cast<int64_t>(audio.size());
  // Frames start at `a` and cover [a + k*hop, a + k*hop + win).
  const int64_t search_from = start - Round(o.back_s * rate);
  const int64_t search_to = start + Round(o.forward_s * rate);
  const int64_t a = std::max(first_index, search_from - Round(o.floor_s * rate));
  const int64_t b = std::min(audio_end, std::max(end, search_to + win));
  if (b - a < win) {
    out.why = "no audio around the phrase";
    return out;
  }
  const size_t n = static_cast<size_t>((b - a - win) / hop + 1);
  std::vector<double> e(n);
  for (size_t k = 0; k < n; ++k) {
    const int16_t* p = audio.data() + (a - first_index) + static_cast<int64_t>(k) * hop;
    double sum = 0;
    for (int64_t i = 0; i < win; ++i) sum += static_cast<double>(p[i]) * p[i];
    e[k] = 10.0 * std::log10(sum / static_cast<double>(win) + 1e-3);
  }
  auto frame_of = [&](int64_t index) -> int64_t { return (index - a) / hop; };
  const int64_t frames = static_cast<int64_t>(n);
  const int64_t s0 = std::clamp<int64_t>(frame_of(search_from), 0, frames);
  const int64_t s1 = std::clamp<int64_t>(frame_of(search_to) + 1, 0, frames);
  if (s1 <= s0) {
    out.why = "no audio around the phrase";
    return out;
  }
  const int64_t min_floor_frames = Round(0.1 * rate) / hop;
  if (s0 < min_floor_frames) {
    out.why = "too little audio before the phrase for a noise floor";
    return out;
  }
  const std::vector<double> floor_frames(e.begin(), e.begin() + s0);
  out.floor_db = Percentile(floor_frames, o.floor_percentile);
  const double noise_high = Percentile(floor_frames, 95);
  const int64_t level_from = std::clamp<int64_t>(frame_of(start), 0, static_cast<int64_t>(n) - 1);
  const int64_t level_to =
      std::clamp<int64_t>(frame_of(end), level_from + 1, static_cast<int64_t>(n));
  out.level_db = Percentile(std::vector<double>(e.begin() + level_from, e.begin() + level_to), 95);
  const double span = out.level_db - out.floor_db;
  const double upper =
      std::max(out.floor_db + std::clamp(o.on_fraction * span, o.on_min_db, o.on_max_db),
               noise_high + o.above_noise_db);
  const double lower = out.floor_db + std::clamp(o.low_fraction * span, o.low_min_db,
                                                 std::max(o.low_min_db, o.on_max_db / 3));
  const int64_t hold = std::max<int64_t>(1, Round(o.hold_s * rate) / hop);
  for (int64_t k = s0; k < s1; ++k) {
    if (k + hold > static_cast<int64_t>(n)) break;
    bool held = true;
    for (int64_t j = k; j < k + hold && held; ++j) held = e[static_cast<size_t>(j)] > upper;
    if (!held) continue;
    int64_t j = k;
    while (j > s0 && e[static_cast<size_t>(j - 1)] > lower) --j;
    if (j == s0 && s0 > 0 && e[static_cast<size_t>(s0)] > lower) {
      out.why = "the phrase is joined to earlier sound";
      return out;
    }
    out.index = a + j * hop + win / 2;
    out.method = OnsetMethod::kEnergy;
    return out;
  }
  out.why = "no clear rise above the noise";
  return out;
}

}  // namespace tickmark::voice

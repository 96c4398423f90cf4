#include "clients/voice/voice_detector.h"

#include <algorithm>
#include <cmath>
#include <utility>

namespace tickmark::voice {
namespace {

constexpr int64_t kBlock = kModelSampleRate / 20;  // 50 ms
constexpr size_t kQuietHistory = 200;              // 10 s of blocks
constexpr size_t kQuietRecent = 6;                 // the last 0.3 s
constexpr double kQuietMarginDb = 6;

}  // namespace

VoiceDetector::VoiceDetector(const VoiceProfile* profile, KeywordSpotter* spotter,
                             const SampleClock* clock, Options options)
    : profile_(profile), spotter_(spotter), clock_(clock), options_(options) {}

bool VoiceDetector::Quiet() const {
  if (block_db_.size() < 2 * kQuietRecent) return false;
  std::vector<double> sorted(block_db_.begin(), block_db_.end());
  std::nth_element(sorted.begin(), sorted.begin() + static_cast<long>(sorted.size() / 10),
                   sorted.end());
  const double floor = sorted[sorted.size() / 10];
  for (size_t k = block_db_.size() - kQuietRecent; k < block_db_.size(); ++k) {
    if (block_db_[k] > floor + kQuietMarginDb) return false;
  }
  return true;
}

std::vector<VoiceEvent> VoiceDetector::Feed(int64_t first_index, std::span<const int16_t> samples) {
  std::vector<VoiceEvent> out;
  if (!started_ || first_index != next_index_) {
    if (started_) {
      // A gap: what was heard before it is finished with the audio before it.
      ++stats_.gaps;
      out = Finish();
    }
    ring_.clear();
    ring_first_ = first_index;
    block_db_.clear();
    block_sum_ = 0;
    block_fill_ = 0;
    started_ = true;
  }
  ring_.insert(ring_.end(), samples.begin(), samples.end());
  next_index_ = first_index + static_cast<int64_t>(samples.size());
  stats_.samples += samples.size();
  for (int16_t v : samples) {
    block_sum_ += static_cast<double>(v) * v;
    if (++block_fill_ == kBlock) {
      block_db_.push_back(10 * std::log10(block_sum_ / kBlock + 1e-3));
      if (block_db_.size() > kQuietHistory) block_db_.pop_front();
      block_sum_ = 0;
      block_fill_ = 0;
    }
  }
  std::vector<VoiceEvent> heard = Complete(spotter_->Feed(first_index, samples, Quiet()));
  for (VoiceEvent& e : heard) out.push_back(std::move(e));
  // Trim the ring to ring_s, in steps, so that erasing is rare.
  const int64_t keep = Round(options_.ring_s * kModelSampleRate);
  if (static_cast<int64_t>(ring_.size()) > keep + keep / 2) {
    const int64_t drop = static_cast<int64_t>(ring_.size()) - keep;
    ring_.erase(ring_.begin(), ring_.begin() + drop);
    ring_first_ += drop;
  }
  return out;
}

std::vector<VoiceEvent> VoiceDetector::Finish() { return Complete(spotter_->Finish()); }

std::vector<VoiceEvent> VoiceDetector::Complete(std::vector<Heard> heard) {
  std::vector<VoiceEvent> out;
  for (Heard& h : heard) {
    VoiceEvent e;
    e.phrase = &profile_->phrases[h.phrase];
    e.recogniser_ns = clock_->TimeOf(h.start);
    e.end_ns = clock_->TimeOf(h.end);
    e.settled_ns = clock_->TimeOf(h.settled_at - 1);
    if (h.accepted) {
      ++stats_.accepted;
      e.onset = FindOnset(ring_, ring_first_, h.start, h.end, kModelSampleRate, options_.onset);
      ++(e.onset.method == OnsetMethod::kEnergy ? stats_.energy_onsets : stats_.recogniser_onsets);
      e.onset_ns = clock_->TimeOf(e.onset.index);
      if (options_.keep_windows) {
        const int64_t from = std::max(
            ring_first_, e.onset.index - Round(options_.window_before_s * kModelSampleRate));
        const int64_t to = std::min(ring_first_ + static_cast<int64_t>(ring_.size()),
                                    h.end + Round(options_.window_after_s * kModelSampleRate));
        if (to > from) {
          e.window.assign(ring_.begin() + (from - ring_first_), ring_.begin() + (to - ring_first_));
          e.window_first = from;
        }
      }
    } else {
      ++stats_.rejected;
      e.onset.index = h.start;
      e.onset.why = h.rejected_because;
    }
    e.heard = std::move(h);
    out.push_back(std::move(e));
  }
  return out;
}

}  // namespace tickmark::voice

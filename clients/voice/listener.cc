#include "clients/voice/listener.h"

#include <fcntl.h>
#include <unistd.h>

#include <algorithm>
#include <cmath>
#include <utility>

namespace tickmark::voice {

std::string InputLabel(const VoiceEvent& e, std::optional<int64_t> recognised_ns) {
  std::string s = "voice:" + e.phrase->text + " onset=" + OnsetMethodName(e.onset.method);
  if (recognised_ns && e.onset_ns) {
    const int64_t ms = std::clamp<int64_t>((*recognised_ns - *e.onset_ns) / 1'000'000, 0, 99999);
    s += " lat=" + std::to_string(ms) + "ms";
  }
  return s;
}

Listener::Listener(std::unique_ptr<AudioSource> source, std::unique_ptr<KeywordSpotter> spotter,
                   const VoiceProfile* profile, const MonotonicSource* clock, Options options)
    : source_(std::move(source)),
      spotter_(std::move(spotter)),
      profile_(profile),
      clock_(clock),
      options_(options),
      sample_clock_(kModelSampleRate),
      detector_(profile_, spotter_.get(), &sample_clock_, [&] {
        VoiceDetector::Options d = options.detector;
        d.keep_windows = d.keep_windows || options.keeper != nullptr;
        return d;
      }()) {
  if (pipe2(wake_, O_NONBLOCK | O_CLOEXEC) != 0) wake_[0] = wake_[1] = -1;
}

Listener::~Listener() {
  Stop();
  if (wake_[0] >= 0) close(wake_[0]);
  if (wake_[1] >= 0) close(wake_[1]);
}

void Listener::Start() {
  thread_ = std::thread([this] { Run(); });
}

void Listener::Stop() {
  stop_ = true;
  if (thread_.joinable()) thread_.join();
}

std::vector<ListenerItem> Listener::Take() {
  char drain[64];
  while (wake_[0] >= 0 && read(wake_[0], drain, sizeof drain) > 0) {
  }
  std::lock_guard<std::mutex> l(mu_);
  std::vector<ListenerItem> out;
  out.swap(items_);
  return out;
}

VoiceDetector::Stats Listener::stats() const {
  std::lock_guard<std::mutex> l(mu_);
  return stats_;
}
double Listener::fitted_ppm() const {
  std::lock_guard<std::mutex> l(mu_);
  return ppm_;
}
int Listener::decoders_started() const {
  std::lock_guard<std::mutex> l(mu_);
  return decoders_;
}

void Listener::Push(ListenerItem item) {
  {
    std::lock_guard<std::mutex> l(mu_);
    items_.push_back(std::move(item));
    stats_ = detector_.stats();
    ppm_ = sample_clock_.fitted_ppm();
    decoders_ = spotter_->decoders_started();
  }
  if (wake_[1] >= 0) (void)!write(wake_[1], "x", 1);
}

void Listener::Handle(std::vector<VoiceEvent> events, bool live) {
  for (VoiceEvent& e : events) {
    ListenerItem item;
    item.recognised_ns = live ? std::optional<int64_t>(clock_->NowNanos()) : e.settled_ns;
    if (e.heard.accepted && options_.keeper != nullptr && !e.window.empty()) {
      auto sha = options_.keeper->Keep(e.window, kModelSampleRate);
      if (sha.ok()) {
        item.audio_sha256 = *sha;
      } else {
        item.note = "audio not kept: " + std::string(sha.status().message());
      }
    }
    e.window.clear();
    e.window.shrink_to_fit();
    item.event = std::move(e);
    Push(std::move(item));
  }
}

void Listener::Run() {
  const int64_t stop_index =
      options_.stop_after_s > 0 ? Round(options_.stop_after_s * kModelSampleRate) : -1;
  if (auto start = source_->declared_start_ns()) sample_clock_.Declare(*start);
  while (!stop_) {
    auto block = source_->Read(200);
    if (!block.ok()) {
      Handle(detector_.Finish(), source_->live());
      ListenerItem item;
      item.ended = true;
      item.error = block.status();
      ended_ = true;
      Push(std::move(item));
      return;
    }
    if (block->gap && !sample_clock_.declared()) sample_clock_.Reset();
    for (const auto& [index, ns] : block->timing) sample_clock_.Observe(index, ns);
    if (!block->note.empty()) {
      ListenerItem item;
      item.note = block->note;
      Push(std::move(item));
    }
    std::span<const int16_t> samples(block->samples);
    bool reached_stop = false;
    if (stop_index >= 0 &&
        block->first_index + static_cast<int64_t>(samples.size()) >= stop_index) {
      samples =
          samples.first(static_cast<size_t>(std::max<int64_t>(0, stop_index - block->first_index)));
      reached_stop = true;
    }
    if (!samples.empty()) Handle(detector_.Feed(block->first_index, samples), source_->live());
    if (block->end || reached_stop) break;
  }
  Handle(detector_.Finish(), source_->live());
  ListenerItem item;
  item.ended = true;
  ended_ = true;
  Push(std::move(item));
}

}  // namespace tickmark::voice

#include "clients/voice/alsa_source.h"

#include <alsa/asoundlib.h>

#include <atomic>
#include <chrono>
#include <condition_variable>
#include <cstdlib>
#include <deque>
#include <mutex>
#include <thread>
#include <utility>
#include <vector>

#include "clients/voice/keyword_spotter.h"

namespace tickmark::voice {
namespace {

// ALSA keeps a global configuration cache; error output goes to stderr
// unless silenced. Our messages say what failed instead.
void QuietAlsaErrors(const char*, int, const char*, int, const char*, ...) {}

absl::Status AlsaError(const std::string& device, const std::string& what, int err) {
  return absl::UnavailableError("ALSA device \"" + device + "\": " + what + ": " +
                                snd_strerror(err));
}

class AlsaSource final : public AudioSource {
 public:
  AlsaSource(AlsaOptions options, const MonotonicSource* clock)
      : options_(std::move(options)), clock_(clock) {}
  ~AlsaSource() override {
    {
      std::lock_guard<std::mutex> l(mu_);
      stop_ = true;
      cv_.notify_all();
    }
    if (thread_.joinable()) thread_.join();
    Close();
  }

  absl::Status Start() {
    if (absl::Status s = OpenDevice(); !s.ok()) return s;
    thread_ = std::thread([this] { Capture(); });
    return absl::OkStatus();
  }

  absl::StatusOr<AudioBlock> Read(int timeout_ms) override {
    std::unique_lock<std::mutex> l(mu_);
    cv_.wait_for(l, std::chrono::milliseconds(timeout_ms), [&] { return !queue_.empty(); });
    if (queue_.empty()) {
      AudioBlock b;
      b.first_index = next_read_index_;
      return b;
    }
    AudioBlock b = std::move(queue_.front());
    queue_.pop_front();
    // Periods are short (20 ms); hand over up to 100 ms at once.
    while (!queue_.empty() && b.samples.size() < 1600 && !queue_.front().gap &&
           queue_.front().note.empty() &&
           queue_.front().first_index == b.first_index + static_cast<int64_t>(b.samples.size())) {
      AudioBlock& next = queue_.front();
      b.samples.insert(b.samples.end(), next.samples.begin(), next.samples.end());
      b.timing.insert(b.timing.end(), next.timing.begin(), next.timing.end());
      queue_.pop_front();
    }
    queued_ -= b.samples.size();
    cv_.notify_all();
    next_read_index_ = b.first_index + static_cast<int64_t>(b.samples.size());
    return b;
  }

  std::string Describe() const override { return "ALSA device " + options_.device; }
  bool live() const override { return true; }

 private:
  absl::Status OpenDevice() {
    snd_lib_error_set_handler(&QuietAlsaErrors);
    snd_pcm_t* pcm = nullptr;
    const std::string& dev = options_.device;
    int e = snd_pcm_open(&pcm, dev.c_str(), SND_PCM_STREAM_CAPTURE, 0);
    if (e < 0) return AlsaError(dev, "cannot open for capture", e);
    snd_pcm_hw_params_t* hw;
    snd_pcm_hw_params_alloca(&hw);
    unsigned rate = kModelSampleRate;
    unsigned period = options_.period_us;
    unsigned buffer = options_.buffer_us;
    const char* step = "hardware parameters";
    if ((e = snd_pcm_hw_params_any(pcm, hw)) < 0 ||
        (e = snd_pcm_hw_params_set_access(pcm, hw, SND_PCM_ACCESS_RW_INTERLEAVED)) < 0 ||
        (step = "16-bit samples",
         (e = snd_pcm_hw_params_set_format(pcm, hw, SND_PCM_FORMAT_S16_LE)) < 0) ||
        (step = "one channel", (e = snd_pcm_hw_params_set_channels(pcm, hw, 1)) < 0) ||
        (step = "16000 Hz", (e = snd_pcm_hw_params_set_rate_near(pcm, hw, &rate, nullptr)) < 0) ||
        (step = "period",
         (e = snd_pcm_hw_params_set_period_time_near(pcm, hw, &period, nullptr)) < 0) ||
        (step = "buffer",
         (e = snd_pcm_hw_params_set_buffer_time_near(pcm, hw, &buffer, nullptr)) < 0) ||
        (step = "hardware parameters", (e = snd_pcm_hw_params(pcm, hw)) < 0)) {
      snd_pcm_close(pcm);
      return AlsaError(dev,
                       std::string("cannot set ") + step +
                           " (a plug device such as \"default\" or \"plughw:1\" converts)",
                       e);
    }
    if (rate != kModelSampleRate) {
      snd_pcm_close(pcm);
      return absl::UnavailableError("ALSA device \"" + dev + "\" offers " + std::to_string(rate) +
                                    " Hz, not 16000; use a plug device (\"plughw:CARD\")");
    }
    snd_pcm_uframes_t period_frames = 0;
    snd_pcm_hw_params_get_period_size(hw, &period_frames, nullptr);
    snd_pcm_sw_params_t* sw;
    snd_pcm_sw_params_alloca(&sw);
    if ((e = snd_pcm_sw_params_current(pcm, sw)) < 0 ||
        (e = snd_pcm_sw_params_set_tstamp_mode(pcm, sw, SND_PCM_TSTAMP_ENABLE)) < 0 ||
        (e = snd_pcm_sw_params_set_tstamp_type(pcm, sw, SND_PCM_TSTAMP_TYPE_MONOTONIC)) < 0 ||
        (e = snd_pcm_sw_params(pcm, sw)) < 0) {
      // Timestamps on another clock (or none): read times stand in.
      monotonic_stamps_ = false;
    }
    if ((e = snd_pcm_start(pcm)) < 0 && snd_pcm_state(pcm) != SND_PCM_STATE_RUNNING) {
      snd_pcm_close(pcm);
      return AlsaError(dev, "cannot start capture", e);
    }
    pcm_ = pcm;
    period_frames_ = period_frames > 0 ? period_frames : kModelSampleRate / 50;
    return absl::OkStatus();
  }

  void Close() {
    if (pcm_ != nullptr) snd_pcm_close(pcm_);
    pcm_ = nullptr;
  }

  // Queues a block. A reader more than kMaxQueuedSamples behind makes the
  // capture thread wait: a sound card then overruns its own buffer (the
  // next read reports it, and the gap is marked), and a device that is not
  // paced by a clock (ALSA's null and file plugins) simply waits.
  void Push(AudioBlock b) {
    std::unique_lock<std::mutex> l(mu_);
    cv_.wait(l, [&] { return queued_ < kMaxQueuedSamples || stop_.load(); });
    queued_ += b.samples.size();
    queue_.push_back(std::move(b));
    cv_.notify_all();
  }

  // A gap skips one sample number, so that every consumer sees the
  // discontinuity; times after it come from new timing pairs.
  void Note(const std::string& note, bool gap) {
    if (gap) ++index_;
    AudioBlock b;
    b.first_index = index_;
    b.note = note;
    b.gap = gap;
    Push(std::move(b));
  }

  // The capture thread: reads periods, stamps them, queues them.
  void Capture() {
    std::vector<int16_t> buf;
    snd_pcm_status_t* st;
    snd_pcm_status_alloca(&st);
    bool gap = false;
    bool warned_stamps = false;
    while (!stop_) {
      if (pcm_ == nullptr) {
        std::this_thread::sleep_for(std::chrono::seconds(1));
        if (OpenDevice().ok()) {
          Note("ALSA device \"" + options_.device + "\" is back", true);
          gap = true;
        }
        continue;
      }
      buf.resize(period_frames_);
      // Wait with a timeout, so that a stalled device cannot hold the
      // thread past the destructor.
      const int ready = snd_pcm_wait(pcm_, 200);
      if (ready == 0) continue;
      const snd_pcm_sframes_t n =
          ready < 0 ? ready : snd_pcm_readi(pcm_, buf.data(), period_frames_);
      const int64_t read_ns = clock_->NowNanos();
      if (n < 0) {
        if (n == -EPIPE) {
          Note("overrun: audio was lost (the computer fell behind); timing starts over", true);
          gap = true;
        }
        if (snd_pcm_recover(pcm_, static_cast<int>(n), 1) < 0 || n == -ENODEV) {
          Close();
          Note("ALSA device \"" + options_.device + "\" is gone (" +
                   snd_strerror(static_cast<int>(n)) + "); waiting for it",
               true);
          gap = true;
          continue;
        }
        snd_pcm_start(pcm_);
        continue;
      }
      AudioBlock b;
      b.first_index = index_;
      b.samples.assign(buf.begin(), buf.begin() + n);
      b.gap = gap;
      gap = false;
      index_ += n;
      std::pair<int64_t, int64_t> pair{index_ - 1, read_ns};
      if (monotonic_stamps_ && snd_pcm_status(pcm_, st) == 0) {
        snd_htimestamp_t ts;
        snd_pcm_status_get_htstamp(st, &ts);
        const int64_t stamp = int64_t{ts.tv_sec} * 1'000'000'000 + ts.tv_nsec;
        const int64_t avail = static_cast<int64_t>(snd_pcm_status_get_avail(st));
        // A monotonic stamp lies shortly before the read returned.
        if (stamp > 0 && stamp <= read_ns + 1'000'000 && read_ns - stamp < 5'000'000'000) {
          pair = {index_ + avail - 1, stamp};
        } else if (!warned_stamps) {
          warned_stamps = true;
          b.note = "the device's timestamps are not on CLOCK_MONOTONIC; timing uses read times";
        }
      }
      b.timing.push_back(pair);
      Push(std::move(b));
    }
  }

  AlsaOptions options_;
  const MonotonicSource* clock_;
  snd_pcm_t* pcm_ = nullptr;  // capture thread's (and Start's, before it)
  snd_pcm_uframes_t period_frames_ = 0;
  bool monotonic_stamps_ = true;
  int64_t index_ = 0;  // capture thread's: samples captured
  std::atomic<bool> stop_{false};
  std::thread thread_;
  std::mutex mu_;
  std::condition_variable cv_;
  std::deque<AudioBlock> queue_;  // guarded by mu_
  size_t queued_ = 0;             // samples in queue_; guarded by mu_
  static constexpr size_t kMaxQueuedSamples = 30 * kModelSampleRate;
  int64_t next_read_index_ = 0;  // Read()'s
};

}  // namespace

absl::StatusOr<std::unique_ptr<AudioSource>> OpenAlsaSource(AlsaOptions options,
                                                            const MonotonicSource* clock) {
  auto source = std::make_unique<AlsaSource>(std::move(options), clock);
  if (absl::Status s = source->Start(); !s.ok()) return s;
  return std::unique_ptr<AudioSource>(std::move(source));
}

std::string ListAlsaCaptureDevices() {
  snd_lib_error_set_handler(&QuietAlsaErrors);
  void** hints = nullptr;
  if (snd_device_name_hint(-1, "pcm", &hints) < 0 || hints == nullptr) {
    return "no ALSA devices (is ALSA configured?)\n";
  }
  std::string out;
  for (void** h = hints; *h != nullptr; ++h) {
    char* name = snd_device_name_get_hint(*h, "NAME");
    char* desc = snd_device_name_get_hint(*h, "DESC");
    char* io = snd_device_name_get_hint(*h, "IOID");
    const bool capture = io == nullptr || std::string(io) == "Input";
    if (name != nullptr && capture) {
      std::string d = desc != nullptr ? desc : "";
      for (char& c : d) c = c == '\n' ? ' ' : c;
      out += std::string(name) + (d.empty() ? "" : "\t" + d) + "\n";
    }
    free(name);
    free(desc);
    free(io);
  }
  snd_device_name_free_hint(hints);
  return out.empty() ? "no ALSA capture devices\n" : out;
}

}  // namespace tickmark::voice

// Listener: tickmark-voice's audio thread. It reads the AudioSource, keeps
// the SampleClock, runs the VoiceDetector, writes --keep-audio files, and
// hands each heard phrase (with the moment it was recognised) to the main
// thread through a queue and a wake-up pipe that poll() can wait on.
//
// Recognition time: for a live source, CLOCK_MONOTONIC when the detector
// returned the phrase (what a trainer waits for); for a file, the audio time
// of the sample at which the phrase became final (the file is read faster
// than real time). The recognition latency is that minus the onset.
//
// Thread-safety: Start, Stop, Take and the accessors may be called from any
// thread; the audio thread owns the source, spotter, detector and clock.
#ifndef TICKMARK_CLIENTS_VOICE_LISTENER_H_
#define TICKMARK_CLIENTS_VOICE_LISTENER_H_

#include <atomic>
#include <cstdint>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include "absl/status/status.h"
#include "clients/voice/audio_source.h"
#include "clients/voice/keep_audio.h"
#include "clients/voice/keyword_spotter.h"
#include "clients/voice/sample_clock.h"
#include "clients/voice/voice_detector.h"
#include "clients/voice/voice_profile.h"
#include "server/core/time.h"

namespace tickmark::voice {

struct ListenerItem {
  std::optional<VoiceEvent> event;
  std::optional<int64_t> recognised_ns;  // see the file comment
  std::string audio_sha256;              // of the kept file, raw bytes; empty if none
  std::string audio_path;                // the kept file (pending name)
  std::string note;                      // something to tell the user
  bool ended = false;                    // the audio ended (or failed: see error)
  absl::Status error;
};

class Listener {
 public:
  struct Options {
    double stop_after_s = 0;        // audio seconds; 0: until the audio ends or Stop()
    AudioKeeper* keeper = nullptr;  // --keep-audio, or null; not owned
    VoiceDetector::Options detector;
  };
  // `profile` and `clock` must outlive the listener.
  Listener(std::unique_ptr<AudioSource> source, std::unique_ptr<KeywordSpotter> spotter,
           const VoiceProfile* profile, const MonotonicSource* clock, Options options);
  ~Listener();  // Stop()s
  Listener(const Listener&) = delete;
  Listener& operator=(const Listener&) = delete;

  void Start();
  void Stop();
  // Readable when items wait; Take() drains it.
  int wake_fd() const { return wake_[0]; }
  std::vector<ListenerItem> Take();
  const AudioSource& source() const { return *source_; }
  bool ended() const { return ended_.load(); }
  // Counters for the summary, copied under the lock.
  VoiceDetector::Stats stats() const;
  double fitted_ppm() const;
  int decoders_started() const;

 private:
  void Run();
  void Push(ListenerItem item);
  void Handle(std::vector<VoiceEvent> events, bool live);

  std::unique_ptr<AudioSource> source_;
  std::unique_ptr<KeywordSpotter> spotter_;
  const VoiceProfile* profile_;
  const MonotonicSource* clock_;
  Options options_;
  SampleClock sample_clock_;
  VoiceDetector detector_;
  int wake_[2] = {-1, -1};
  std::atomic<bool> stop_{false};
  std::atomic<bool> ended_{false};
  std::thread thread_;
  mutable std::mutex mu_;
  std::vector<ListenerItem> items_;  // guarded by mu_
  VoiceDetector::Stats stats_;       // guarded by mu_
  double ppm_ = 0;                   // guarded by mu_
  int decoders_ = 0;                 // guarded by mu_
};

// The feedback's input label: "voice:good job onset=energy lat=804ms" (at
// most 64 bytes, server/rpc/validation.cc).
std::string InputLabel(const VoiceEvent& e, std::optional<int64_t> recognised_ns);

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_LISTENER_H_

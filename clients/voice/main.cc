// tickmark-voice: a trainer source that listens for spoken phrases
// ("good job", "not like that") and sends each as feedback, timed at the
// moment the trainer started speaking. main() wires flags → profile →
// spotter → audio source → Listener (the audio thread) → StreamClient; the
// listening pipeline is in the library (listener.h) so tests feed it files.
#include <fcntl.h>
#include <poll.h>
#include <pthread.h>
#include <signal.h>
#include <sys/ioctl.h>
#include <unistd.h>

#include <atomic>
#include <chrono>
#include <cstdio>
#include <iostream>
#include <map>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include "clients/common/channel.h"
#include "clients/common/client_id.h"
#include "clients/common/connection_flags.h"
#include "clients/common/stream_client.h"
#include "clients/common/token.h"
#include "clients/keys/calibrate.h"
#include "clients/keys/calibration_flags.h"
#include "clients/keys/key_map.h"
#include "clients/keys/profile_toml.h"
#include "clients/keys/status_line.h"
#include "clients/keys/terminal.h"
#include "clients/voice/alsa_source.h"
#include "clients/voice/audio_source.h"
#include "clients/voice/keep_audio.h"
#include "clients/voice/keyword_spotter.h"
#include "clients/voice/listener.h"
#include "clients/voice/voice_profile.h"
#include "server/base/flags.h"
#include "server/core/time.h"
#include "tickmark/version.h"

namespace tickmark::voice {
namespace {

constexpr char kProgram[] = "tickmark-voice";
constexpr char kDescription[] =
    "tickmark-voice: send approve/disapprove feedback by voice to a tickmark\n"
    "session (a trainer source). It listens for the phrases of a profile and\n"
    "times each at the moment you started saying it.";

constexpr char kFooter[] =
    R"usage(Privacy: no audio is written or sent anywhere unless --keep-audio DIR is
given. Recognition runs on this computer; the server receives only the
feedback (value, time, the phrase and how it was timed). With --keep-audio,
each detection's audio (about a second or two) is kept in DIR as a WAV file
named by the feedback's client sequence, and only that file's SHA-256 goes
to the server's ledger. Recording people's voices needs their consent;
local regulations and your ethics board apply (docs/voice.md).

Phrases: multi-syllable phrases ("good job", "not like that") are recognised
far more reliably than single short words, which are missed and also heard
in other speech. Profiles: clients/voice/profiles/ (en-basic.toml,
en-graded.toml); --verbose prints every phrase heard, with its score against
the phrase's threshold, to tune a profile for your voice and room.

Timing: the event time is the onset of the phrase: the recogniser's word
segmentation, refined by the rise of the sound energy around it (method
"energy", or "recogniser" when the rise is unclear), on CLOCK_MONOTONIC, the
clock the server probes. Recognition comes 0.8-1.3 s after the onset (the
phrase itself, then 0.35 s to be sure); that delay is not in the event
time, and is reported in the feedback's input label
("voice:good job onset=energy lat=804ms"). From ALSA, sample times come from
the device's monotonic timestamps. From a file, say when its first sample
was recorded (--audio-start MONO_NS, or ends-now for a recording that just
ended); from a pipe (--wav - or --raw -), "live" stamps reads as they come,
late by the recorder's own buffering.

Audio: 16 kHz mono; ALSA's plug devices convert ("default", "plughw:1");
files must be 16 kHz (sox IN -r 16000 -c 1 -b 16 OUT.wav converts).

%CALIBRATION%
--detect-only needs no server or token: it prints each phrase heard
("heard phrase=... onset_s=... method=... latency_ms=...") and sends nothing.

--client-id defaults to <installation id>:tickmark-voice:<device or file name> (a random
id kept in ~/.local/state/tickmark/installation-id; never the user or host name).
Exit status: 0 when everything sent was acknowledged; 1 otherwise (or an
audio error); 2 for usage and configuration errors. Ctrl-C quits.

tickmark is not a safety system: a robot trained with it needs an
independent emergency stop. Studies with people need ethics-board approval.
)usage";

struct VoiceFlags {
  std::string profile;
  std::string alsa_device = "default";
  std::string wav;
  std::string raw;
  std::string audio_start;
  double stop_after_s = 0;
  bool list_devices = false;
  std::string keep_audio;
  bool detect_only = false;
  bool quiet = false;
  bool verbose = false;
  double flush_timeout_s = 10;
  client::ConnectionFlags connection;
  keys::CalibrationFlags calibration;
};

std::string Footer() {
  std::string text = kFooter;
  const std::string mark = "%CALIBRATION%\n";
  text.replace(text.find(mark), mark.size(),
               keys::CalibrationHelp(
                   "phrases (timed at their onsets;\nthe terminal keys only start and stop)",
                   "tickmark-voice --profile clients/voice/profiles/en-basic.toml \\\n"
                   "  --token-file trainer.token --calibrate") +
                   "\n");
  return text;
}

void Define(CLI::App& app, VoiceFlags* f) {
  ConfigureApp(app, Footer());
  const std::string audio = "Audio";
  app.add_option("--profile", f->profile,
                 "TOML: the phrases to listen for and their values; see clients/voice/profiles/")
      ->type_name("FILE")
      ->group(audio);
  CLI::Option* alsa = app.add_option("--alsa-device", f->alsa_device,
                                     "ALSA capture device (the default source); see --list-devices")
                          ->capture_default_str()
                          ->type_name("NAME")
                          ->group(audio);
  CLI::Option* wav = app.add_option("--wav", f->wav, "read a WAV file instead (- for stdin)")
                         ->type_name("FILE")
                         ->excludes(alsa)
                         ->group(audio);
  app.add_option("--raw", f->raw,
                 "read raw signed 16-bit little-endian mono 16 kHz samples instead (- for stdin)")
      ->type_name("FILE")
      ->excludes(alsa)
      ->excludes(wav)
      ->group(audio);
  app.add_option("--audio-start", f->audio_start,
                 "for --wav/--raw: when the first sample was recorded: CLOCK_MONOTONIC "
                 "nanoseconds, ends-now (the input ends now), or live (stamp reads; the "
                 "default for stdin)")
      ->type_name("WHEN")
      ->check(CLI::Validator(
          [](std::string& v) -> std::string {
            if (v == "live" || v == "ends-now") return "";
            if (v.empty() || v.size() > 19 ||
                v.find_first_not_of("0123456789") != std::string::npos) {
              return "expected live, ends-now or a number of nanoseconds";
            }
            return "";
          },
          ""))
      ->group(audio);
  app.add_option("--stop-after", f->stop_after_s,
                 "stop after this many seconds of audio (0: never)")
      ->check(Between(0, 1e7))
      ->group(audio);
  app.add_flag("--list-devices", f->list_devices, "list ALSA capture devices and exit")
      ->group(audio);
  app.add_option("--keep-audio", f->keep_audio,
                 "keep each detection's audio as a WAV file in DIR (only its SHA-256 goes to "
                 "the ledger); without it no audio is written or sent")
      ->type_name("DIR")
      ->group("Privacy");
  client::AddConnectionFlags(app, &f->connection);
  const std::string output = "Output";
  app.add_flag("--detect-only", f->detect_only,
               "no server: print each phrase heard and send nothing")
      ->group(output);
  client::AddFlushTimeoutFlag(app, &f->flush_timeout_s)->group(output);
  app.add_flag("--quiet", f->quiet, "print only errors (and, with --detect-only, the heard lines)")
      ->group(output);
  app.add_flag("--verbose", f->verbose,
               "per phrase: onset vs recognition time, score and threshold; also near misses")
      ->group(output);
  keys::AddCalibrationFlags(app, &f->calibration);
}

int Usage(const std::string& message) {
  std::cerr << kProgram << ": " << message << "\n";
  return kExitUsage;
}

std::chrono::steady_clock::time_point After(double s) {
  return std::chrono::steady_clock::now() +
         std::chrono::duration_cast<std::chrono::steady_clock::duration>(
             std::chrono::duration<double>(s));
}

double AudioSeconds(int64_t index) { return static_cast<double>(index) / kModelSampleRate; }

std::string Quote(const std::string& s) { return "\"" + s + "\""; }

// "heard phrase="good job" value=+1 onset_s=... ...": one line per phrase,
// for scripts and tests (audio seconds count from the input's first sample).
std::string HeardLine(const ListenerItem& item) {
  const VoiceEvent& e = *item.event;
  char buf[512];
  std::snprintf(buf, sizeof buf,
                "heard phrase=%s value=%s onset_s=%.6f method=%s recogniser_s=%.6f end_s=%.6f "
                "settled_s=%.6f score=%d threshold=%d",
                Quote(e.phrase->text).c_str(), keys::profile::FormatValue(e.phrase->value).c_str(),
                AudioSeconds(e.onset.index), OnsetMethodName(e.onset.method),
                AudioSeconds(e.heard.start), AudioSeconds(e.heard.end),
                AudioSeconds(e.heard.settled_at), e.heard.score, e.heard.threshold_score);
  std::string line = buf;
  if (e.onset_ns) line += " onset_ns=" + std::to_string(*e.onset_ns);
  if (item.recognised_ns && e.onset_ns) {
    line += " latency_ms=" + std::to_string((*item.recognised_ns - *e.onset_ns) / 1'000'000);
  }
  if (!item.audio_sha256.empty()) line += " audio_sha256=" + Hex(item.audio_sha256);
  return line;
}

// --verbose: onset vs recognition, in words.
std::string VerboseLine(const ListenerItem& item) {
  const VoiceEvent& e = *item.event;
  char buf[512];
  if (!e.heard.accepted) {
    std::snprintf(buf, sizeof buf, "not taken: %s at %.3f s, score %d (threshold %d): %s",
                  Quote(e.phrase->text).c_str(), AudioSeconds(e.heard.start), e.heard.score,
                  e.heard.threshold_score, e.heard.rejected_because.c_str());
    return buf;
  }
  std::string latency = "?";
  if (item.recognised_ns && e.onset_ns) {
    latency = std::to_string((*item.recognised_ns - *e.onset_ns) / 1'000'000) + " ms";
  }
  std::snprintf(buf, sizeof buf,
                "%s %s: onset %.3f s (%s%s; recogniser %.3f s), end %.3f s, recognised "
                "%s after the onset; score %d (threshold %d)",
                Quote(e.phrase->text).c_str(), keys::profile::FormatValue(e.phrase->value).c_str(),
                AudioSeconds(e.onset.index), OnsetMethodName(e.onset.method),
                e.onset.why.empty() ? "" : (": " + e.onset.why).c_str(),
                AudioSeconds(e.heard.start), AudioSeconds(e.heard.end), latency.c_str(),
                e.heard.score, e.heard.threshold_score);
  return buf;
}

absl::StatusOr<std::unique_ptr<AudioSource>> OpenSource(const VoiceFlags& f) {
  if (f.wav.empty() && f.raw.empty()) {
    return OpenAlsaSource({.device = f.alsa_device}, SystemMonotonic::Get());
  }
  StreamSourceOptions o;
  o.path = f.wav.empty() ? f.raw : f.wav;
  o.format = f.wav.empty() ? StreamFormat::kRaw : StreamFormat::kWav;
  if (f.audio_start == "live" || (f.audio_start.empty() && o.path == "-")) {
    o.timing = StreamTiming::kLive;
  } else if (f.audio_start == "ends-now") {
    o.timing = StreamTiming::kEndsNow;
  } else {
    o.timing = StreamTiming::kDeclared;
    o.start_ns = f.audio_start.empty() ? 0 : std::stoll(f.audio_start);
  }
  return OpenStreamSource(o, SystemMonotonic::Get());
}

// The phrases as the calibration's answers (keys/calibrate.h).
class VoiceAnswers final : public keys::ExternalAnswers {
 public:
  VoiceAnswers(Listener* listener, const VoiceProfile* profile)
      : listener_(listener), profile_(profile) {}

  client::CalibrationInput Poll(int timeout_ms, int also_fd) override {
    client::CalibrationInput in;
    pollfd fds[2] = {{listener_->wake_fd(), POLLIN, 0}, {also_fd, POLLIN, 0}};
    poll(fds, also_fd >= 0 ? 2 : 1, timeout_ms);
    for (ListenerItem& item : listener_->Take()) {
      if (!item.note.empty()) note_ = item.note;
      if (item.ended) note_ = item.error.ok() ? "the audio ended" : item.error.ToString();
      if (!item.event || !item.event->heard.accepted || !item.event->onset_ns) continue;
      const VoiceEvent& e = *item.event;
      if (e.phrase->value == 0) continue;
      // The answer's time is the phrase's onset, like feedback's.
      in.answers.push_back(
          {*e.onset_ns, e.phrase->value > 0, InputLabel(e, item.recognised_ns).substr(0, 64)});
    }
    return in;
  }
  std::string Describe() const override { return listener_->source().Describe(); }
  std::string ApproveInputs() const override { return Phrases(+1); }
  std::string DisapproveInputs() const override { return Phrases(-1); }
  std::string Note() const override { return note_; }

 private:
  std::string Phrases(int sign) const {
    std::string out;
    for (const Phrase& p : profile_->phrases) {
      if ((sign > 0 && p.value > 0) || (sign < 0 && p.value < 0)) {
        out += (out.empty() ? "" : ", ") + Quote(p.text);
      }
    }
    return out.empty() ? "(none)" : "saying " + out;
  }

  Listener* listener_;
  const VoiceProfile* profile_;
  std::string note_;
};

// Sends what the listener hears until it ends or a quit signal; returns the
// exit code.
int RunSend(Listener& listener, client::TrainerClient& stream, client::StreamOptions options,
            const VoiceFlags& f, const VoiceProfile& profile, AudioKeeper* keeper, int quit_fd,
            std::atomic<bool>& quit) {
  const bool tty = isatty(STDERR_FILENO) != 0 && !f.quiet;
  const bool lines = isatty(STDOUT_FILENO) == 0 && !f.quiet;  // machine-readable to stdout
  std::mutex mu;
  std::vector<std::string> notes;          // guarded by mu
  std::optional<keys::LastFeedback> last;  // guarded by mu
  auto note = [&](const std::string& s) {
    std::lock_guard<std::mutex> l(mu);
    notes.push_back(s);
  };
  client::TrainerClient::Callbacks cb;
  cb.on_ack = [&](const client::AckInfo& a, const tickmark::v1::FeedbackMessage& m) {
    std::string kept;
    if (keeper != nullptr && !m.audio_sha256().empty()) {
      auto path = keeper->Acknowledged(m.audio_sha256(), a.client_sequence);
      kept = path.ok() ? " audio=" + *path
                       : " audio_note=" + Quote(std::string(path.status().message()));
    }
    char buf[256];
    std::snprintf(buf, sizeof buf,
                  "ack seq=%llu value=%+g event_session_ns=%lld uncertainty_ns=%lld%s",
                  static_cast<unsigned long long>(a.client_sequence), m.value(),
                  static_cast<long long>(a.event_session_ns),
                  static_cast<long long>(a.uncertainty_ns), a.duplicate ? " duplicate" : "");
    std::lock_guard<std::mutex> l(mu);
    last = keys::LastFeedback{m.value(), a.event_session_ns, a.uncertainty_ns};
    if (lines) {
      std::printf("%s input=%s%s\n", buf, Quote(m.input()).c_str(), kept.c_str());
      std::fflush(stdout);
    }
  };
  cb.on_rejected = [&](uint64_t seq, const tickmark::v1::FeedbackMessage& m,
                       const absl::Status& s) {
    std::string kept;
    if (keeper != nullptr && !m.audio_sha256().empty()) {
      auto path = keeper->Rejected(m.audio_sha256(), seq);
      if (path.ok()) kept = " (its audio: " + *path + ")";
    }
    note("rejected #" + std::to_string(seq) + " " + Quote(m.input()) + ": " + s.ToString() + kept);
  };
  cb.on_state = [&](const client::StreamStatus& s) {
    if (s.state == client::StreamState::kWaiting || s.state == client::StreamState::kFailed) {
      note(std::string(s.state == client::StreamState::kFailed ? "stopped"
                                                               : "stream lost, reconnecting") +
           ": " + s.last_error.ToString());
    }
  };
  if (absl::Status s = stream.Connect(std::move(options), std::move(cb)); !s.ok()) {
    return Usage(s.ToString());
  }
  const std::string legend = profile.Legend();
  std::string last_heard;
  bool audio_ok = true;
  listener.Start();
  while (!quit.load()) {
    pollfd fds[2] = {{listener.wake_fd(), POLLIN, 0}, {quit_fd, POLLIN, 0}};
    poll(fds, 2, 500);
    bool ended = false;
    for (ListenerItem& item : listener.Take()) {
      if (!item.note.empty()) note(item.note);
      if (item.ended) {
        ended = true;
        if (!item.error.ok()) {
          note("audio: " + item.error.ToString());
          audio_ok = false;
        }
      }
      if (!item.event) continue;
      const VoiceEvent& e = *item.event;
      if (f.verbose) note(VerboseLine(item));
      if (!e.heard.accepted) continue;
      if (!e.onset_ns || *e.onset_ns <= 0) {
        note("heard " + Quote(e.phrase->text) +
             " but its time is unknown (no audio timing yet); not sent");
        continue;
      }
      if (lines) {
        std::lock_guard<std::mutex> l(mu);
        std::printf("%s\n", HeardLine(item).c_str());
        std::fflush(stdout);
      }
      tickmark::v1::FeedbackMessage m;
      m.set_value(e.phrase->value);
      m.set_event_source_ns(*e.onset_ns);
      m.set_input(InputLabel(e, item.recognised_ns));
      m.set_audio_sha256(item.audio_sha256);
      last_heard = Quote(e.phrase->text);
      if (absl::Status s = stream.Send(std::move(m)); !s.ok()) note("not sent: " + s.ToString());
    }
    std::string out;
    {
      std::lock_guard<std::mutex> l(mu);
      for (const std::string& n : notes)
        out += (tty ? "\r\033[K" : "") + std::string(kProgram) + ": " + n + "\n";
      notes.clear();
      if (tty) {
        winsize ws{};
        const size_t cols = ioctl(STDERR_FILENO, TIOCGWINSZ, &ws) == 0 ? ws.ws_col : 0;
        const std::string prefix = std::string(listener.ended() ? "audio ended" : "listening") +
                                   (last_heard.empty() ? "" : "  heard " + last_heard) + " | ";
        out += "\r\033[K" + keys::FormatStatusLine(stream.status(), last, prefix + legend,
                                                   cols > 1 ? cols - 1 : 0);
      }
    }
    if (!out.empty()) (void)!write(STDERR_FILENO, out.data(), out.size());
    if (ended) break;
    if (stream.status().state == client::StreamState::kFailed) break;  // said by on_state
  }
  if (tty) (void)!write(STDERR_FILENO, "\n", 1);
  listener.Stop();
  absl::Status flushed = stream.Flush(After(f.flush_timeout_s));
  (void)stream.Close(After(2.0));
  {
    std::lock_guard<std::mutex> l(mu);
    for (const std::string& n : notes) std::fprintf(stderr, "%s: %s\n", kProgram, n.c_str());
    notes.clear();
  }
  const client::StreamStatus st = stream.status();
  const VoiceDetector::Stats ds = listener.stats();
  std::fprintf(stderr,
               "%s: heard %llu phrases (%llu timed by the energy rise, %llu by the recogniser); "
               "sent %llu, acknowledged %llu, rejected %llu, unacknowledged %llu\n",
               kProgram, static_cast<unsigned long long>(ds.accepted),
               static_cast<unsigned long long>(ds.energy_onsets),
               static_cast<unsigned long long>(ds.recogniser_onsets),
               static_cast<unsigned long long>(st.sent), static_cast<unsigned long long>(st.acked),
               static_cast<unsigned long long>(st.rejected),
               static_cast<unsigned long long>(st.pending));
  if (!flushed.ok()) std::fprintf(stderr, "%s: %s\n", kProgram, flushed.ToString().c_str());
  if (keeper != nullptr) {
    for (const std::string& p : keeper->Pending()) {
      std::fprintf(stderr, "%s: %s: its feedback was not acknowledged\n", kProgram, p.c_str());
    }
  }
  if (f.verbose) {
    std::fprintf(
        stderr,
        "%s: audio clock: %.1f ppm against CLOCK_MONOTONIC; %d recogniser starts; %llu gaps\n",
        kProgram, listener.fitted_ppm(), listener.decoders_started(),
        static_cast<unsigned long long>(ds.gaps));
  }
  return flushed.ok() && st.pending == 0 && st.rejected == 0 && audio_ok &&
                 st.state != client::StreamState::kFailed
             ? 0
             : 1;
}

int RunDetectOnly(Listener& listener, const VoiceFlags& f, int quit_fd, std::atomic<bool>& quit) {
  listener.Start();
  bool audio_ok = true;
  bool ended = false;
  while (!ended && !quit.load()) {
    pollfd fds[2] = {{listener.wake_fd(), POLLIN, 0}, {quit_fd, POLLIN, 0}};
    poll(fds, 2, 500);
    for (ListenerItem& item : listener.Take()) {
      if (!item.note.empty()) std::fprintf(stderr, "%s: %s\n", kProgram, item.note.c_str());
      if (item.ended) {
        ended = true;
        if (!item.error.ok()) {
          std::fprintf(stderr, "%s: audio: %s\n", kProgram, item.error.ToString().c_str());
          audio_ok = false;
        }
      }
      if (!item.event) continue;
      if (f.verbose) std::fprintf(stderr, "%s: %s\n", kProgram, VerboseLine(item).c_str());
      if (item.event->heard.accepted) {
        std::printf("%s\n", HeardLine(item).c_str());
        std::fflush(stdout);
      }
    }
  }
  listener.Stop();
  for (ListenerItem& item : listener.Take()) {
    if (item.event && item.event->heard.accepted && !f.quiet)
      std::printf("%s\n", HeardLine(item).c_str());
  }
  const VoiceDetector::Stats ds = listener.stats();
  if (!f.quiet) {
    std::fprintf(stderr,
                 "%s: heard %llu phrases in %.1f s of audio (%llu timed by the energy rise, %llu "
                 "by the recogniser)\n",
                 kProgram, static_cast<unsigned long long>(ds.accepted),
                 static_cast<double>(ds.samples) / kModelSampleRate,
                 static_cast<unsigned long long>(ds.energy_onsets),
                 static_cast<unsigned long long>(ds.recogniser_onsets));
  }
  return audio_ok ? 0 : 1;
}

int Main(int argc, char** argv) {
  VoiceFlags f;
  CLI::App app(kDescription, kProgram);
  Define(app, &f);
  if (auto exit = ParseCommandLine(app, argc, argv)) return *exit;
  if (f.list_devices) {
    std::cout << ListAlsaCaptureDevices();
    return 0;
  }
  if (f.profile.empty()) {
    return Usage("--profile is required (e.g. clients/voice/profiles/en-basic.toml)");
  }
  const bool file = !f.wav.empty() || !f.raw.empty();
  const std::string path = f.wav.empty() ? f.raw : f.wav;
  if (!file && !f.audio_start.empty()) return Usage("--audio-start is for --wav and --raw");
  if (file && path != "-" && f.audio_start.empty() && !f.detect_only) {
    return Usage(
        "--wav/--raw FILE needs --audio-start: ends-now (the recording just ended), "
        "the CLOCK_MONOTONIC nanoseconds of its first sample, or live");
  }
  if (f.detect_only && f.calibration.calibrate)
    return Usage("--detect-only and --calibrate exclude each other");
  if (f.calibration.calibrate && file && (path == "-" || f.audio_start != "live")) {
    return Usage(
        "--calibrate listens live and reads the terminal on stdin: use ALSA, or a FIFO "
        "with --audio-start live (--raw PATH)");
  }
  if (f.calibration.calibrate && !f.keep_audio.empty()) {
    return Usage("--keep-audio keeps the audio of sent feedback; not with --calibrate");
  }
  auto profile = LoadVoiceProfile(f.profile);
  if (!profile.ok()) return Usage(std::string(profile.status().message()));

  std::optional<client::Token> token;
  if (!f.detect_only) {
    auto t = client::ReadToken(f.connection.token);
    if (!t.ok()) return Usage(std::string(t.status().message()));
    for (const std::string& w : t->warnings) std::cerr << kProgram << ": warning: " << w << "\n";
    token = *std::move(t);
  }
  if (f.calibration.calibrate) {
    if (isatty(STDIN_FILENO) == 0 || isatty(STDOUT_FILENO) == 0) {
      return Usage("--calibrate needs a terminal on stdin and stdout (it draws the task there)");
    }
    // Before any thread starts: only the calibration's watcher takes them.
    keys::BlockTerminalSignals();
  }
  // The quit signals are blocked before any thread starts (gRPC's, ALSA's,
  // the listener's); one thread sigwaits for them.
  sigset_t set;
  sigemptyset(&set);
  for (int sig : {SIGINT, SIGTERM, SIGHUP, SIGUSR1}) sigaddset(&set, sig);
  pthread_sigmask(SIG_BLOCK, &set, nullptr);

  auto spotter = KeywordSpotter::Create(*profile);
  if (!spotter.ok()) {
    return absl::IsInvalidArgument(spotter.status())
               ? Usage(std::string(spotter.status().message()))
               : (std::cerr << kProgram << ": " << spotter.status().message() << "\n", 1);
  }
  if (!f.quiet) {
    for (const std::string& w : (*spotter)->warnings())
      std::cerr << kProgram << ": warning: " << w << "\n";
  }
  std::unique_ptr<AudioKeeper> keeper;
  if (!f.keep_audio.empty()) {
    if (f.detect_only)
      return Usage("--keep-audio keeps the audio of sent feedback; not with --detect-only");
    auto k = AudioKeeper::Open(f.keep_audio);
    if (!k.ok()) return Usage(std::string(k.status().message()));
    keeper = *std::move(k);
  }
  auto source = OpenSource(f);
  if (!source.ok()) {
    std::cerr << kProgram << ": " << source.status().message() << "\n";
    return absl::IsInvalidArgument(source.status()) ? kExitUsage : 1;
  }
  const std::string described = (*source)->Describe();
  Listener::Options lo;
  lo.stop_after_s = f.stop_after_s;
  lo.keeper = keeper.get();
  Listener listener(*std::move(source), *std::move(spotter), &*profile, SystemMonotonic::Get(), lo);

  int wake[2];
  if (pipe2(wake, O_NONBLOCK | O_CLOEXEC) != 0) return Usage("pipe2 failed");
  std::atomic<bool> quit{false};
  std::thread watcher;
  if (!f.calibration.calibrate) {
    watcher = std::thread([&] {
      int sig = 0;
      while (sigwait(&set, &sig) == 0) {
        if (sig == SIGUSR1) return;
        quit = true;
        (void)!write(wake[1], "x", 1);
      }
    });
  }
  auto finish = [&](int code) {
    if (watcher.joinable()) {
      pthread_kill(watcher.native_handle(), SIGUSR1);
      watcher.join();
    }
    close(wake[0]);
    close(wake[1]);
    return code;
  };
  if (!f.quiet) std::cerr << kProgram << ": listening to " << described << "\n";
  if (f.detect_only) return finish(RunDetectOnly(listener, f, wake[0], quit));

  auto channel = client::ChooseCredentials(f.connection.channel);
  if (!channel.ok()) return finish(Usage(std::string(channel.status().message())));
  std::string source_name = file ? (path == "-" ? "stdin" : path) : f.alsa_device;
  if (size_t slash = source_name.rfind('/'); slash != std::string::npos) {
    source_name = source_name.substr(slash + 1);
  }
  const std::string client_id = f.connection.client_id.empty()
                                    ? client::DefaultClientId(kProgram, source_name)
                                    : f.connection.client_id;
  if (absl::Status s = client::ValidateClientId(client_id); !s.ok()) {
    return finish(Usage(std::string(s.message())));
  }
  client::StreamOptions options;
  options.target = f.connection.channel.target;
  options.token = token->value;
  options.client_id = client_id;
  options.source = {tickmark::v1::SOURCE_KIND_VOICE,
                    "voice: " + described + ", profile " + profile->name,
                    std::string(kProgram) + " " + TICKMARK_VERSION};
  options.credentials = channel->credentials;
  options.clock = SystemMonotonic::Get();
  options.send_realtime = !f.connection.no_realtime;
  client::TrainerClient stream;
  if (f.calibration.calibrate) {
    VoiceAnswers answers(&listener, &*profile);
    listener.Start();
    const int code = keys::RunCalibration(stream, std::move(options), f.calibration,
                                          keys::KeyMap::Defaults(), &answers);
    listener.Stop();
    return finish(code);
  }
  return finish(
      RunSend(listener, stream, std::move(options), f, *profile, keeper.get(), wake[0], quit));
}

}  // namespace
}  // namespace tickmark::voice

int main(int argc, char** argv) { return tickmark::voice::Main(argc, argv); }

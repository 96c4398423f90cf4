// tickmark-serial: a trainer source reading a serial response box (line or
// raw protocol, see serial_protocol.h) and sending its presses to tickmarkd
// over a reconnecting Train stream. main() wires flags → profile → port →
// StreamClient; the decoding lives in the library so tests feed it bytes.
#include <fcntl.h>
#include <pthread.h>
#include <signal.h>
#include <unistd.h>

#include <atomic>
#include <chrono>
#include <cstdio>
#include <iostream>
#include <mutex>
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
#include "clients/keys/terminal.h"
#include "clients/serial/marker_follow.h"
#include "clients/serial/serial_source.h"
#include "clients/serial/sync_line.h"
#include "server/base/flags.h"
#include "tickmark/version.h"
#include "server/core/time.h"

namespace tickmark::serial {
namespace {

constexpr char kProgram[] = "tickmark-serial";
constexpr char kDescription[] =
    "tickmark-serial: send approve/disapprove feedback from a serial response\n"
    "box to a tickmark session (a trainer source).";

constexpr char kFooter[] =
    R"usage(--client-id defaults to <installation id>:tickmark-serial:<port> (a random id
kept in ~/.local/state/tickmark/installation-id; never the user or host name).

Timing: a line "B1 down 123456" carries the box's clock (µs). That clock is
not the host's, so it is mapped to the host's CLOCK_MONOTONIC (the clock
probes are answered with) by a running minimum of receive time − box time:
the varying delay (USB polling, scheduling) is removed; the minimum transit
stays as a small constant late bias. Lines without a time, and raw bytes,
are stamped with the time read() returned them: later than the press by the
transmission time and USB-serial latency, which is not corrected.

Sync lines (docs/sync.md): --sync-out DTR (or RTS) sends a pulse on that
modem control line at a jittered interval (--sync-interval, default 1 s)
and, with --sync-marker-token (an observer token of the session), at every
marker; --sync-in CTS (DSR, DCD) records another system's pulses. Each edge
is timed on CLOCK_MONOTONIC by readings right around the ioctl and stored as
a sync_pulse record; `tickmark align` fits another recorder's pulse times to
them. Never wire a line to equipment attached to a person without your
lab's biomedical engineering / safety approval and an isolated input.

%CALIBRATION%
Exit status: 0 when everything sent was acknowledged; 1 otherwise; 2 for
usage and configuration errors. Ctrl-C quits.

tickmark is not a safety system: a robot trained with it needs an
independent emergency stop. Studies with people need ethics-board approval.
)usage";

// The box's port settings given on the command line; each overrides the
// profile's when given.
struct BoxFlags {
  std::string port;
  std::string profile;
  CLI::Option* protocol = nullptr;
  std::string protocol_value;
  CLI::Option* baud = nullptr;
  unsigned baud_value = 0;
  CLI::Option* parity = nullptr;
  std::string parity_value;
  CLI::Option* stop_bits = nullptr;
  std::string stop_bits_value;
  CLI::Option* data_bits = nullptr;
  unsigned data_bits_value = 0;
  bool no_box_clock = false;
};

void DefineBoxFlags(CLI::App& app, BoxFlags* b) {
  const std::string box = "Box";
  app.add_option("--port", b->port,
                 "serial device (/dev/ttyUSB0, /dev/ttyACM0, a pty); unplugging is survived: "
                 "the port is reopened when it comes back")
      ->type_name("PATH")
      ->required()
      ->group(box);
  app.add_option("--profile", b->profile,
                 "TOML: a [serial] table and [[binding]]s mapping box buttons to values; see "
                 "clients/serial/profiles/ (line-box.toml, raw-box.toml)")
      ->type_name("FILE")
      ->required()
      ->group(box);
  b->protocol = app.add_option("--protocol", b->protocol_value, "line or raw; must match the profile's")
                    ->check(CLI::IsMember({"line", "raw"}))
                    ->group(box);
  b->baud = app.add_option("--baud", b->baud_value, "bits per second (default: the profile's, else 115200)")
                ->default_str("")
                ->check(CLI::Range(50u, 4'000'000u))
                ->group(box);
  b->parity = app.add_option("--parity", b->parity_value, "parity (default: the profile's)")
                  ->check(CLI::IsMember({"none", "even", "odd"}))
                  ->group(box);
  b->stop_bits = app.add_option("--stop-bits", b->stop_bits_value, "stop bits (default: the profile's)")
                     ->check(CLI::IsMember({"1", "1.5", "2"}))
                     ->group(box);
  b->data_bits = app.add_option("--data-bits", b->data_bits_value, "data bits (default: the profile's)")
                     ->default_str("")
                     ->check(CLI::Range(5u, 8u))
                     ->group(box);
  app.add_flag("--no-box-clock", b->no_box_clock,
               "ignore the box's own timestamps; use receive times")
      ->group(box);
}

std::string Footer() {
  std::string text = kFooter;
  const std::string mark = "%CALIBRATION%\n";
  text.replace(text.find(mark), mark.size(),
               keys::CalibrationHelp("box buttons (the terminal keys start and stop)",
                                     "tickmark-serial --port /dev/ttyUSB0 --token-file "
                                     "trainer.token \\\n  --profile "
                                     "clients/serial/profiles/line-box.toml --calibrate") +
                   "\n");
  return text;
}

// The box as the calibration's answers (keys/calibrate.h).
class SerialAnswers final : public keys::ExternalAnswers {
 public:
  SerialAnswers(SerialSource* port, const keys::ButtonMap* map, std::string path)
      : port_(port), map_(map), path_(std::move(path)) {}

  client::CalibrationInput Poll(int timeout_ms, int also_fd) override {
    client::CalibrationInput in;
    SerialSource::Batch b = port_->Poll(timeout_ms, also_fd);
    if (b.connected) note_.clear();
    if (b.disconnected) note_ = "box gone";
    for (const TimedPress& t : b.presses) {
      if (!t.event.pressed) continue;  // the judgement is the press
      const keys::Binding* bind = map_->Find(t.event.button);
      if (bind == nullptr) continue;
      if (bind->action == keys::Binding::Action::kQuit) {
        in.quit = true;
      } else if (bind->value != 0) {
        in.answers.push_back({t.event_ns, bind->value > 0, "serial:" + t.event.button});
      }
    }
    return in;
  }
  std::string Describe() const override { return "the serial box on " + path_; }
  std::string ApproveInputs() const override { return keys::InputsWithSign(map_->bindings(), +1); }
  std::string DisapproveInputs() const override {
    return keys::InputsWithSign(map_->bindings(), -1);
  }
  std::string Note() const override { return note_; }

 private:
  SerialSource* port_;
  const keys::ButtonMap* map_;
  std::string path_;
  std::string note_;
};

// The sync line flags (docs/sync.md).
struct SyncFlags {
  std::string out;
  std::vector<std::string> in;
  std::string port;
  double interval_s = 1.0;
  double jitter = 0.25;
  double width_ms = 10;
  CLI::Option* seed = nullptr;
  uint64_t seed_value = 0;
  std::string marker_token_file;
  bool simulate = false;
  bool active() const { return !out.empty() || !in.empty(); }
};

void DefineSyncFlags(CLI::App& app, SyncFlags* s) {
  const std::string g = "Sync lines (docs/sync.md)";
  app.add_option("--sync-out", s->out, "drive this modem control line with sync pulses: DTR or RTS")
      ->type_name("LINE")
      ->group(g);
  app.add_option("--sync-in", s->in,
                 "record edges of this input line as sync pulses: CTS, DSR or DCD (repeatable)")
      ->type_name("LINE")
      ->group(g);
  app.add_option("--sync-port", s->port, "serial device whose lines are used (default: --port)")
      ->type_name("PATH")
      ->group(g);
  app.add_option("--sync-interval", s->interval_s, "mean seconds between interval pulses")
      ->check(CLI::Range(0.05, 3600.0))
      ->capture_default_str()
      ->group(g);
  app.add_option("--sync-jitter", s->jitter,
                 "each gap is drawn from interval × [1 − J, 1 + J] so the train has no period")
      ->check(CLI::Range(0.0, 0.9))
      ->capture_default_str()
      ->group(g);
  app.add_option("--sync-width", s->width_ms,
                 "milliseconds a pulse holds the line asserted; 0: toggle (one edge per pulse)")
      ->check(CLI::Range(0.0, 1000.0))
      ->capture_default_str()
      ->group(g);
  s->seed = app.add_option("--sync-seed", s->seed_value,
                           "seed of the gaps' random draw (default: from the clock)")
                ->group(g);
  app.add_option("--sync-marker-token", s->marker_token_file,
                 "observer token file of the session: send a pulse at each new marker")
      ->type_name("FILE")
      ->group(g);
  app.add_flag("--sync-simulate", s->simulate,
               "move no line (no ioctl); time and record the pulses as if (rehearsal, tests)")
      ->group(g);
}

tickmark::v1::SyncPulseMessage ToMessage(const SyncEdge& e, const std::string& device,
                                         bool simulated) {
  tickmark::v1::SyncPulseMessage m;
  m.set_direction(e.out ? tickmark::v1::SYNC_DIRECTION_OUT : tickmark::v1::SYNC_DIRECTION_IN);
  m.set_line(ModemLineName(e.line));
  m.set_level(e.level);
  m.set_event_source_ns(e.event_ns);
  m.set_source_uncertainty_ns(e.half_bracket_ns);
  m.set_reason(e.reason == SyncEdge::Reason::kMarker     ? tickmark::v1::SYNC_REASON_MARKER
               : e.reason == SyncEdge::Reason::kExternal ? tickmark::v1::SYNC_REASON_EXTERNAL
                                                         : tickmark::v1::SYNC_REASON_INTERVAL);
  m.set_pulse_index(e.pulse_index);
  m.set_marker_sequence(e.marker_sequence);
  m.set_device(device);
  m.set_simulated(simulated);
  return m;
}

int Usage(const std::string& message) {
  std::cerr << kProgram << ": " << message << "\n";
  return 2;
}

std::chrono::steady_clock::time_point After(double s) {
  return std::chrono::steady_clock::now() +
         std::chrono::duration_cast<std::chrono::steady_clock::duration>(
             std::chrono::duration<double>(s));
}

int Main(int argc, char** argv) {
  BoxFlags box;
  client::ConnectionFlags connection;
  double flush_timeout_s = 10;
  bool quiet = false;
  bool verbose = false;
  keys::CalibrationFlags calibration;
  CLI::App app(kDescription, kProgram);
  ConfigureApp(app, Footer());
  DefineBoxFlags(app, &box);
  client::AddConnectionFlags(app, &connection);
  const std::string output = "Output";
  client::AddFlushTimeoutFlag(app, &flush_timeout_s)->group(output);
  app.add_flag("--quiet", quiet, "print only errors")->group(output);
  app.add_flag("--verbose", verbose, "one line per event; at exit the timing report")
      ->group(output);
  keys::AddCalibrationFlags(app, &calibration);
  SyncFlags sync;
  DefineSyncFlags(app, &sync);
  if (auto exit = ParseCommandLine(app, argc, argv)) return *exit;

  std::optional<ModemLine> sync_out;
  std::vector<ModemLine> sync_in;
  if (!sync.out.empty()) {
    sync_out = ParseModemLine(sync.out);
    if (!sync_out || !IsOutputLine(*sync_out)) return Usage("--sync-out must be DTR or RTS");
  }
  for (const std::string& name : sync.in) {
    auto line = ParseModemLine(name);
    if (!line || IsOutputLine(*line)) return Usage("--sync-in must be CTS, DSR or DCD");
    sync_in.push_back(*line);
  }
  if (!sync.active() && (sync.simulate || !sync.marker_token_file.empty() || !sync.port.empty())) {
    return Usage(
        "--sync-simulate, --sync-port and --sync-marker-token need --sync-out or --sync-in");
  }
  if (!sync.marker_token_file.empty() && !sync_out) {
    return Usage("--sync-marker-token needs --sync-out (marker pulses are sent, not read)");
  }
  if (calibration.calibrate && sync.active()) {
    return Usage("--calibrate does not send sync pulses; run them in the session itself");
  }
  std::optional<client::Token> marker_token;
  if (!sync.marker_token_file.empty()) {
    client::TokenFlags tf;
    tf.token_file = sync.marker_token_file;
    auto t = client::ReadToken(tf);
    if (!t.ok()) return Usage("--sync-marker-token: " + std::string(t.status().message()));
    marker_token = *std::move(t);
  }

  auto profile = LoadSerialProfile(box.profile);
  if (!profile.ok()) return Usage(std::string(profile.status().message()));
  PortSettings& ps = profile->settings;
  if (box.protocol->count() > 0) {
    const auto wanted = box.protocol_value == "raw" ? PortSettings::Protocol::kRaw
                                                    : PortSettings::Protocol::kLine;
    if (wanted != ps.protocol) {
      return Usage("--protocol differs from the profile's; its button names would not fit");
    }
  }
  if (box.baud->count() > 0) ps.baud = box.baud_value;
  if (box.data_bits->count() > 0) ps.data_bits = box.data_bits_value;
  if (box.parity->count() > 0) ps.parity = box.parity_value;
  if (box.stop_bits->count() > 0) ps.stop_bits = box.stop_bits_value;
  if (box.no_box_clock) ps.box_clock = false;

  auto token = client::ReadToken(connection.token);
  if (!token.ok()) return Usage(std::string(token.status().message()));
  for (const std::string& w : token->warnings) std::cerr << kProgram << ": warning: " << w << "\n";

  if (calibration.calibrate) {
    if (isatty(STDIN_FILENO) == 0 || isatty(STDOUT_FILENO) == 0) {
      return Usage("--calibrate needs a terminal on stdin and stdout (it draws the task there)");
    }
    // Before gRPC starts threads: only the calibration's watcher takes them.
    keys::BlockTerminalSignals();
  }
  // Block the quit signals before gRPC starts threads; one thread sigwaits.
  sigset_t set;
  sigemptyset(&set);
  for (int sig : {SIGINT, SIGTERM, SIGHUP, SIGUSR1}) sigaddset(&set, sig);
  pthread_sigmask(SIG_BLOCK, &set, nullptr);

  auto channel = client::ChooseCredentials(connection.channel);
  if (!channel.ok()) return Usage(std::string(channel.status().message()));
  std::string source = box.port;
  if (size_t slash = source.rfind('/'); slash != std::string::npos) source = source.substr(slash + 1);
  const std::string client_id =
      connection.client_id.empty() ? client::DefaultClientId(kProgram, source) : connection.client_id;
  if (absl::Status s = client::ValidateClientId(client_id); !s.ok()) {
    return Usage(std::string(s.message()));
  }
  client::StreamOptions options;
  options.target = connection.channel.target;
  options.token = token->value;
  options.client_id = client_id;
  options.source = {tickmark::v1::SOURCE_KIND_SERIAL, "serial box on " + box.port,
                    std::string(kProgram) + " " + TICKMARK_VERSION};
  options.credentials = channel->credentials;
  options.clock = SystemMonotonic::Get();
  options.send_realtime = !connection.no_realtime;

  if (calibration.calibrate) {
    SerialSource port(box.port, ps);
    if (absl::Status s = port.Open(); !s.ok()) {
      std::fprintf(stderr, "%s: %s\n", kProgram, s.ToString().c_str());
      return 1;
    }
    SerialAnswers answers(&port, &profile->buttons, box.port);
    client::TrainerClient stream;
    return keys::RunCalibration(stream, std::move(options), calibration,
                                keys::KeyMap::Defaults(), &answers);
  }

  int wake[2];
  if (pipe2(wake, O_NONBLOCK | O_CLOEXEC) != 0) return Usage("pipe2 failed");
  std::atomic<bool> quit{false};
  std::thread watcher([&] {
    int sig = 0;
    while (sigwait(&set, &sig) == 0) {
      if (sig == SIGUSR1) return;
      quit = true;
      (void)!write(wake[1], "x", 1);
    }
  });
  std::mutex out_mu;
  client::TrainerClient stream;
  client::TrainerClient::Callbacks cb;
  cb.on_ack = [&](const client::AckInfo& a, const tickmark::v1::FeedbackMessage& f) {
    if (quiet) return;
    std::lock_guard<std::mutex> l(out_mu);
    std::fprintf(stderr, "%s: acked #%llu %+g (%s) ±%.2f ms\n", kProgram,
                 static_cast<unsigned long long>(a.client_sequence), f.value(),
                 f.input().c_str(), static_cast<double>(a.uncertainty_ns) / 1e6);
  };
  cb.on_rejected = [&](uint64_t seq, const tickmark::v1::FeedbackMessage&, const absl::Status& s) {
    std::lock_guard<std::mutex> l(out_mu);
    std::fprintf(stderr, "%s: rejected #%llu: %s\n", kProgram,
                 static_cast<unsigned long long>(seq), s.ToString().c_str());
  };
  cb.on_state = [&](const client::StreamStatus& s) {
    if (quiet && s.state != client::StreamState::kFailed) return;
    std::lock_guard<std::mutex> l(out_mu);
    std::fprintf(stderr, "%s: server %s%s%s\n", kProgram, client::StreamStateName(s.state),
                 s.last_error.ok() ? "" : ": ", s.last_error.ok() ? "" : s.last_error.ToString().c_str());
  };
  cb.on_request_ack = [&](const client::AckInfo& a, const tickmark::v1::TrainerMessage& m) {
    if (!verbose || !m.has_sync_pulse()) return;
    std::lock_guard<std::mutex> l(out_mu);
    std::fprintf(stderr, "%s: sync %s %s pulse %llu at session %.6f s ±%.3f ms\n", kProgram,
                 m.sync_pulse().line().c_str(), m.sync_pulse().level() ? "rise" : "fall",
                 static_cast<unsigned long long>(m.sync_pulse().pulse_index()),
                 static_cast<double>(a.event_session_ns) / 1e9,
                 static_cast<double>(a.uncertainty_ns) / 1e6);
  };
  cb.on_request_rejected = [&](uint64_t seq, const tickmark::v1::TrainerMessage&,
                               const absl::Status& s) {
    std::lock_guard<std::mutex> l(out_mu);
    std::fprintf(stderr, "%s: rejected sync pulse #%llu: %s\n", kProgram,
                 static_cast<unsigned long long>(seq), s.ToString().c_str());
  };
  // The sync lines, opened before the stream so a wrong device is reported
  // at once.
  const std::string sync_device = sync.port.empty() ? box.port : sync.port;
  std::unique_ptr<ModemLines> lines;
  if (sync.active()) {
    if (sync.simulate) {
      lines = SimulatedModemLines(sync_device);
    } else {
      auto opened = OpenTtyModemLines(sync_device);
      if (!opened.ok()) {
        std::fprintf(stderr, "%s: --sync: %s\n", kProgram,
                     std::string(opened.status().message()).c_str());
        return 1;
      }
      lines = *std::move(opened);
    }
  }
  int code = 2;
  if (absl::Status s = stream.Connect(std::move(options), std::move(cb)); !s.ok()) {
    std::fprintf(stderr, "%s: %s\n", kProgram, s.ToString().c_str());
  } else {
    SerialSource port(box.port, ps);
    if (absl::Status s2 = port.Open(); !s2.ok()) {
      std::fprintf(stderr, "%s: %s; waiting for the port\n", kProgram, s2.ToString().c_str());
    }
    const keys::ButtonMap& map = profile->buttons;
    // Sync pulses go out on the stream like feedback (SendRequest).
    auto send_edge = [&](const SyncEdge& e) {
      tickmark::v1::TrainerMessage m;
      *m.mutable_sync_pulse() = ToMessage(e, sync_device, lines->simulated());
      if (absl::Status s3 = stream.SendRequest(std::move(m)); !s3.ok()) {
        std::lock_guard<std::mutex> l(out_mu);
        std::fprintf(stderr, "%s: sync pulse not sent: %s\n", kProgram, s3.ToString().c_str());
      }
    };
    auto sync_error = [&](const absl::Status& s3) {
      std::lock_guard<std::mutex> l(out_mu);
      std::fprintf(stderr, "%s: sync line: %s\n", kProgram, s3.ToString().c_str());
    };
    std::unique_ptr<SyncOutEngine> engine;
    std::unique_ptr<SyncOutRunner> runner;
    std::unique_ptr<SyncInWatcher> watcher_in;
    std::unique_ptr<MarkerFollower> markers;
    if (sync_out) {
      SyncOutOptions so;
      so.line = *sync_out;
      so.interval = Duration::FromSeconds(sync.interval_s);
      so.jitter = sync.jitter;
      so.width = Duration::FromSeconds(sync.width_ms / 1e3);
      so.seed = sync.seed->count() > 0 ? sync.seed_value
                                       : static_cast<uint64_t>(SystemMonotonic::Get()->NowNanos());
      engine = std::make_unique<SyncOutEngine>(so, lines.get(), SystemMonotonic::Get());
      if (absl::Status s3 = engine->Start(); !s3.ok()) {
        sync_error(s3);
        quit = true;
      } else {
        runner = std::make_unique<SyncOutRunner>(engine.get(), send_edge, sync_error);
        runner->Start();
      }
      if (marker_token) {
        markers = std::make_unique<MarkerFollower>(
            grpc::CreateChannel(connection.channel.target, channel->credentials),
            marker_token->value, [&] { return stream.status().session_id; },
            [&](uint64_t seq, const std::string& text) {
              if (runner) runner->QueueMarker(seq);
              if (verbose) {
                std::lock_guard<std::mutex> l(out_mu);
                std::fprintf(stderr, "%s: marker #%llu \"%s\": pulse\n", kProgram,
                             static_cast<unsigned long long>(seq), text.c_str());
              }
            },
            [&](const std::string& note) {
              if (quiet) return;
              std::lock_guard<std::mutex> l(out_mu);
              std::fprintf(stderr, "%s: %s\n", kProgram, note.c_str());
            });
        markers->Start();
      }
    }
    if (!sync_in.empty()) {
      watcher_in = std::make_unique<SyncInWatcher>(lines.get(), sync_in, SystemMonotonic::Get(),
                                                   send_edge, sync_error);
      if (absl::Status s3 = watcher_in->Start(); !s3.ok()) {
        sync_error(s3);
        quit = true;
      }
    }
    while (!quit) {
      SerialSource::Batch batch = port.Poll(500, wake[0]);
      std::lock_guard<std::mutex> l(out_mu);
      for (const std::string& n : batch.notes) std::fprintf(stderr, "%s: %s\n", kProgram, n.c_str());
      for (const TimedPress& t : batch.presses) {
        if (!t.event.pressed) continue;  // the judgement is the press
        const keys::Binding* bind = map.Find(t.event.button);
        if (bind == nullptr) {
          if (!quiet) std::fprintf(stderr, "%s: button %s is not bound\n", kProgram, t.event.button.c_str());
          continue;
        }
        if (bind->action == keys::Binding::Action::kQuit) {
          quit = true;
          continue;
        }
        tickmark::v1::FeedbackMessage f;
        f.set_value(bind->value);
        f.set_event_source_ns(t.event_ns);
        f.set_input("serial:" + t.event.button);
        if (verbose) {
          std::fprintf(stderr, "%s: %s %s, event %.3f ms before the read (%s)\n", kProgram,
                       t.event.button.c_str(), bind->label.c_str(),
                       static_cast<double>(t.event.host_ns - t.event_ns) / 1e6,
                       t.from_box_clock ? "box clock" : "receive time");
        }
        if (absl::Status s3 = stream.Send(std::move(f)); !s3.ok()) {
          std::fprintf(stderr, "%s: not sent: %s\n", kProgram, s3.ToString().c_str());
        }
      }
    }
    if (markers) markers->Stop();
    if (runner) runner->Stop();  // releases the line; its last edge is sent
    if (watcher_in) watcher_in->Stop();
    absl::Status flushed = stream.Flush(After(flush_timeout_s));
    (void)stream.Close(After(2.0));
    const client::StreamStatus st = stream.status();
    std::fprintf(stderr, "%s: sent %llu, acknowledged %llu, rejected %llu, unacknowledged %llu\n",
                 kProgram, static_cast<unsigned long long>(st.sent),
                 static_cast<unsigned long long>(st.acked),
                 static_cast<unsigned long long>(st.rejected),
                 static_cast<unsigned long long>(st.pending));
    if (verbose) std::fprintf(stderr, "%s", port.Report().c_str());
    code = flushed.ok() && st.pending == 0 && st.rejected == 0 ? 0 : 1;
  }
  pthread_kill(watcher.native_handle(), SIGUSR1);
  watcher.join();
  close(wake[0]);
  close(wake[1]);
  return code;
}

}  // namespace
}  // namespace tickmark::serial

int main(int argc, char** argv) { return tickmark::serial::Main(argc, argv); }

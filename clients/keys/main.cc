// tickmark-keys: a trainer source reading keys from a terminal (or feedback
// lines from a pipe) and sending them to tickmarkd over a reconnecting Train
// stream. main() wires flags → key map → StreamClient → input loop.
//
// Event time: CLOCK_MONOTONIC read right after read() returns the byte(s).
// A terminal gives no kernel timestamp for a key press, so this is the
// earliest moment the program can know of it; the delay from the press to
// here (terminal, scheduler) is not measured. Sources that need better timing
// use an input device, whose kernel timestamps can be put on the same clock
// (EVIOCSCLOCKID): with --device, the event time is the kernel's timestamp of
// the press (see evdev.h), and --verbose reports how much earlier it is than
// the read.
#include <fcntl.h>
#include <poll.h>
#include <signal.h>
#include <sys/ioctl.h>
#include <unistd.h>

#include <atomic>
#include <cerrno>
#include <chrono>
#include <cstdio>
#include <cstring>
#include <iostream>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include "clients/common/channel.h"
#include "clients/common/client_id.h"
#include "server/core/time.h"
#include "clients/common/stream_client.h"
#include "clients/common/token.h"
#include "clients/keys/button_map.h"
#include "clients/keys/calibrate.h"
#include "clients/keys/device_pump.h"
#include "clients/keys/evdev.h"
#include "clients/keys/key_map.h"
#include "clients/keys/keys_flags.h"
#include "clients/keys/line_input.h"
#include "clients/keys/status_line.h"
#include "clients/keys/terminal.h"
#include "tickmark/version.h"

namespace tickmark::keys {
namespace {

using client::StreamState;
using client::StreamStatus;
using client::TrainerClient;
using Clock = std::chrono::steady_clock;

constexpr char kProgram[] = "tickmark-keys";
constexpr int kExitOk = 0;
constexpr int kExitIncomplete = 1;
constexpr int kExitUsage = 2;

int Usage(const std::string& message) {
  std::cerr << kProgram << ": " << message << "\n";
  return kExitUsage;
}

Clock::time_point After(double seconds) {
  return Clock::now() + std::chrono::duration_cast<Clock::duration>(
                            std::chrono::duration<double>(seconds));
}

tickmark::v1::FeedbackMessage MakeFeedback(double value, int64_t event_ns,
                                           const std::string& input) {
  tickmark::v1::FeedbackMessage f;
  f.set_value(value);
  f.set_event_source_ns(event_ns);
  f.set_input(input);
  return f;
}

// Flushes, closes and prints the summary; returns the exit code.
int Finish(TrainerClient& client, double flush_timeout_s, int bad_lines) {
  absl::Status flushed = client.Flush(After(flush_timeout_s));
  (void)client.Close(After(2.0));
  const StreamStatus st = client.status();
  std::fprintf(stderr,
               "%s: sent %llu, acknowledged %llu, rejected %llu, "
               "unacknowledged %llu%s\n",
               kProgram, static_cast<unsigned long long>(st.sent),
               static_cast<unsigned long long>(st.acked),
               static_cast<unsigned long long>(st.rejected),
               static_cast<unsigned long long>(st.pending),
               bad_lines > 0 ? (", bad lines " + std::to_string(bad_lines)).c_str() : "");
  if (!flushed.ok()) {
    std::fprintf(stderr, "%s: %s\n", kProgram, flushed.ToString().c_str());
  }
  const bool clean = st.pending == 0 && st.rejected == 0 && bad_lines == 0 &&
                     st.state != StreamState::kFailed;
  return clean ? kExitOk : kExitIncomplete;
}

int RunLines(TrainerClient& client, client::StreamOptions options, bool quiet,
             double flush_timeout_s) {
  std::mutex out_mu;  // keeps lines from the client's threads whole
  TrainerClient::Callbacks cb;
  cb.on_ack = [&](const client::AckInfo& a, const tickmark::v1::FeedbackMessage& f) {
    if (quiet) return;
    std::lock_guard<std::mutex> l(out_mu);
    std::printf("ack seq=%llu value=%+g event_session_ns=%lld uncertainty_ns=%lld%s\n",
                static_cast<unsigned long long>(a.client_sequence), f.value(),
                static_cast<long long>(a.event_session_ns),
                static_cast<long long>(a.uncertainty_ns), a.duplicate ? " duplicate" : "");
    std::fflush(stdout);
  };
  cb.on_rejected = [&](uint64_t seq, const tickmark::v1::FeedbackMessage& f,
                       const absl::Status& s) {
    std::lock_guard<std::mutex> l(out_mu);
    std::fprintf(stderr, "%s: rejected seq=%llu value=%+g: %s\n", kProgram,
                 static_cast<unsigned long long>(seq), f.value(), s.ToString().c_str());
  };
  cb.on_state = [&](const StreamStatus& s) {
    if (quiet && s.state != StreamState::kFailed) return;
    if (s.state != StreamState::kWaiting && s.state != StreamState::kFailed) return;
    std::lock_guard<std::mutex> l(out_mu);
    std::fprintf(stderr, "%s: %s: %s\n", kProgram,
                 s.state == StreamState::kFailed ? "stopped" : "stream lost, reconnecting",
                 s.last_error.ToString().c_str());
  };
  if (absl::Status s = client.Connect(std::move(options), std::move(cb)); !s.ok()) {
    return Usage(s.ToString());
  }
  const MonotonicSource* clock = client.clock();
  LineSplitter splitter;
  int line_no = 0;
  int bad = 0;
  bool stopped = false;
  auto handle = [&](const std::string& line, int64_t t) {
    ++line_no;
    auto parsed = ParseFeedbackLine(line);
    if (!parsed.ok()) {
      std::lock_guard<std::mutex> l(out_mu);
      std::fprintf(stderr, "%s: line %d: %s\n", kProgram, line_no,
                   std::string(parsed.status().message()).c_str());
      ++bad;
      return;
    }
    if (!parsed->has_value()) return;
    absl::Status sent = client.Send(MakeFeedback((*parsed)->value, t, (*parsed)->input));
    if (!sent.ok()) {
      std::lock_guard<std::mutex> l(out_mu);
      std::fprintf(stderr, "%s: line %d not sent: %s\n", kProgram, line_no,
                   sent.ToString().c_str());
      ++bad;
      stopped = client.status().state == StreamState::kFailed;
    }
  };
  char buf[4096];
  while (!stopped) {
    const ssize_t n = read(STDIN_FILENO, buf, sizeof buf);
    const int64_t t = clock->NowNanos();  // every line of this read: now
    if (n < 0 && errno == EINTR) continue;
    if (n < 0) {
      std::fprintf(stderr, "%s: reading stdin: %s\n", kProgram, std::strerror(errno));
      break;
    }
    if (n == 0) {
      if (auto last = splitter.Finish()) handle(*last, t);
      break;
    }
    for (const std::string& line : splitter.Feed(std::string_view(buf, static_cast<size_t>(n)))) {
      handle(line, t);
      if (stopped) break;
    }
  }
  return Finish(client, flush_timeout_s, bad);
}

int RunInteractive(TrainerClient& client, client::StreamOptions options,
                   KeyMap keymap, double flush_timeout_s) {
  RawTerminal terminal(STDIN_FILENO);
  if (absl::Status s = terminal.Enter(); !s.ok()) return Usage(s.ToString());
  int wake[2];
  if (pipe2(wake, O_NONBLOCK | O_CLOEXEC) != 0) return Usage("pipe2 failed");
  auto poke = [&] { (void)!write(wake[1], "x", 1); };
  std::atomic<bool> quit{false};
  SignalWatcher watcher(&terminal, [&] { quit = true; poke(); }, poke);

  std::mutex mu;
  std::optional<LastFeedback> last;  // guarded by mu
  std::vector<std::string> notes;    // lines to print above the status; mu
  TrainerClient::Callbacks cb;
  cb.on_ack = [&](const client::AckInfo& a, const tickmark::v1::FeedbackMessage& f) {
    {
      std::lock_guard<std::mutex> l(mu);
      last = LastFeedback{f.value(), a.event_session_ns, a.uncertainty_ns};
    }
    poke();
  };
  cb.on_rejected = [&](uint64_t seq, const tickmark::v1::FeedbackMessage& f,
                       const absl::Status& s) {
    {
      std::lock_guard<std::mutex> l(mu);
      char buf[64];
      std::snprintf(buf, sizeof buf, "rejected #%llu (%+g): ",
                    static_cast<unsigned long long>(seq), f.value());
      notes.push_back(buf + s.ToString());
    }
    poke();
  };
  cb.on_state = [&](const StreamStatus&) { poke(); };
  if (absl::Status s = client.Connect(std::move(options), std::move(cb)); !s.ok()) {
    terminal.Restore();
    return Usage(s.ToString());
  }
  const MonotonicSource* clock = client.clock();
  const std::string legend = keymap.Legend();
  std::string hint;
  auto redraw = [&] {
    std::string out;
    std::optional<LastFeedback> shown;
    {
      std::lock_guard<std::mutex> l(mu);
      for (const std::string& n : notes) out += "\r\033[K" + n + "\r\n";
      notes.clear();
      shown = last;
    }
    const size_t cols = terminal.Columns();
    out += "\r\033[K" + FormatStatusLine(client.status(), shown,
                                         hint.empty() ? legend : hint,
                                         cols > 1 ? cols - 1 : 0);
    (void)!write(STDOUT_FILENO, out.data(), out.size());
  };

  char buf[256];
  bool escape_pending = false;
  while (!quit) {
    redraw();
    pollfd fds[2] = {{STDIN_FILENO, POLLIN, 0}, {wake[0], POLLIN, 0}};
    // A lone ESC is told from an arrow key by the silence after it.
    const int ready = poll(fds, 2, escape_pending ? 50 : 500);
    if (ready < 0 && errno != EINTR) break;
    std::vector<KeyEvent> events;
    if (ready > 0 && (fds[0].revents & (POLLIN | POLLHUP | POLLERR)) != 0) {
      const ssize_t n = read(STDIN_FILENO, buf, sizeof buf);
      const int64_t t = clock->NowNanos();  // the event time; see the top
      if (n == 0 || (n < 0 && errno != EINTR && errno != EAGAIN)) break;
      if (n > 0) {
        events = keymap.Feed(std::string_view(buf, static_cast<size_t>(n)));
        escape_pending = std::memchr(buf, '\x1b', static_cast<size_t>(n)) != nullptr;
        for (const KeyEvent& e : events) {
          hint.clear();
          if (e.kind == KeyEvent::Kind::kQuit) {
            quit = true;
          } else if (e.kind == KeyEvent::Kind::kUnbound) {
            hint = "key " + e.key + " is not bound; " + legend;
          } else if (absl::Status s = client.Send(MakeFeedback(e.value, t, e.input()));
                     !s.ok()) {
            std::lock_guard<std::mutex> l(mu);
            notes.push_back("not sent: " + s.ToString());
          }
        }
      }
    } else if (ready == 0 && escape_pending) {
      keymap.FlushPending();
      escape_pending = false;
    }
    if (ready > 0 && (fds[1].revents & POLLIN) != 0) {
      char drain[64];
      while (read(wake[0], drain, sizeof drain) > 0) {
      }
    }
  }
  redraw();
  terminal.Restore();
  (void)!write(STDOUT_FILENO, "\r\n", 2);
  if (client.status().pending > 0) {
    std::fprintf(stderr, "%s: waiting up to %gs for %llu acknowledgements\n", kProgram,
                 flush_timeout_s,
                 static_cast<unsigned long long>(client.status().pending));
  }
  const int code = Finish(client, flush_timeout_s, 0);
  close(wake[0]);
  close(wake[1]);
  return code;
}


constexpr char kTerminalReport[] =
    "timing report (terminal or stdin lines):\n"
    "  event time = CLOCK_MONOTONIC read right after read() returned the key's\n"
    "  byte(s): read time - event time is 0 by construction. The delay from the\n"
    "  press to the read (keyboard polling, terminal, scheduling) is unknown and\n"
    "  not corrected; an input device (--device) gives the kernel's timestamp.\n";

int RunDevice(TrainerClient& client, client::StreamOptions options, const KeysFlags& flags,
              const ButtonMap& map) {
  int wake[2];
  if (pipe2(wake, O_NONBLOCK | O_CLOEXEC) != 0) return Usage("pipe2 failed");
  std::atomic<bool> quit{false};
  // The signals were blocked before any thread started; this thread alone
  // takes them, so nothing runs in an asynchronous handler.
  sigset_t set;
  sigemptyset(&set);
  for (int sig : {SIGINT, SIGTERM, SIGHUP, SIGUSR1}) sigaddset(&set, sig);
  std::thread watcher([&] {
    int sig = 0;
    while (sigwait(&set, &sig) == 0) {
      if (sig == SIGUSR1) return;  // our own stop request
      quit = true;
      (void)!write(wake[1], "x", 1);
    }
  });
  std::mutex mu;
  std::optional<LastFeedback> last;  // guarded by mu
  TrainerClient::Callbacks cb;
  cb.on_ack = [&](const client::AckInfo& a, const tickmark::v1::FeedbackMessage& f) {
    std::lock_guard<std::mutex> l(mu);
    last = LastFeedback{f.value(), a.event_session_ns, a.uncertainty_ns};
  };
  cb.on_rejected = [&](uint64_t seq, const tickmark::v1::FeedbackMessage& f,
                       const absl::Status& s) {
    std::fprintf(stderr, "\r\033[K%s: rejected #%llu (%+g): %s\n", kProgram,
                 static_cast<unsigned long long>(seq), f.value(), s.ToString().c_str());
  };
  auto stop_watcher = [&] {
    pthread_kill(watcher.native_handle(), SIGUSR1);
    watcher.join();
  };
  if (absl::Status s = client.Connect(std::move(options), std::move(cb)); !s.ok()) {
    stop_watcher();
    return Usage(s.ToString());
  }
  EvdevDevice device({DeviceSelector{flags.device}, flags.input_dir, flags.grab});
  if (absl::Status s = device.Open(); !s.ok()) {
    std::fprintf(stderr, "%s: %s; waiting for the device\n", kProgram, s.ToString().c_str());
  } else if (!flags.quiet) {
    std::fprintf(stderr, "%s: reading %s \"%s\"%s\n", kProgram, device.info().path.c_str(),
                 device.info().name.c_str(),
                 device.info().is_device && !device.monotonic_clock()
                     ? " (warning: EVIOCSCLOCKID failed; timestamps not on CLOCK_MONOTONIC)"
                     : "");
  }
  DevicePump pump(&device, &map, &client);
  const bool tty = isatty(STDERR_FILENO) != 0;
  const std::string legend = map.Legend();
  while (!quit) {
    DevicePump::StepResult r = pump.Step(500, wake[0]);
    if (r.quit) quit = true;
    std::optional<LastFeedback> shown;
    {
      std::lock_guard<std::mutex> l(mu);
      shown = last;
    }
    std::string out;
    for (const std::string& n : r.notes) out += (tty ? "\r\033[K" : "") + std::string(kProgram) + ": " + n + "\n";
    if (tty && !flags.quiet) {
      const std::string prefix =
          std::string(device.is_open() ? "device ok" : "device gone") +
          (pump.last_sent().empty() ? "" : "  sent " + pump.last_sent()) + " | ";
      winsize ws{};
      const size_t cols = ioctl(STDERR_FILENO, TIOCGWINSZ, &ws) == 0 ? ws.ws_col : 0;
      out += "\r\033[K" + FormatStatusLine(client.status(), shown, prefix + legend,
                                           cols > 1 ? cols - 1 : 0);
    }
    if (!out.empty()) (void)!write(STDERR_FILENO, out.data(), out.size());
  }
  if (tty) (void)!write(STDERR_FILENO, "\n", 1);
  stop_watcher();
  const int code = Finish(client, flags.flush_timeout_s, 0);
  if (flags.verbose) std::fprintf(stderr, "%s", pump.Report().c_str());
  close(wake[0]);
  close(wake[1]);
  return code;
}

std::string TtySource() {
  const char* name = ttyname(STDIN_FILENO);
  std::string s = name != nullptr ? name : "tty";
  if (s.rfind("/dev/", 0) == 0) s = s.substr(5);
  return s;
}

int Main(int argc, char** argv) {
  auto flags = ParseKeysFlags(std::vector<std::string>(argv + 1, argv + argc));
  if (!flags.ok()) {
    return Usage(std::string(flags.status().message()) + " (see " + kProgram + " --help)");
  }
  if (!flags->version.empty()) {
    std::cout << flags->version;
    return kExitOk;
  }
  KeyMap keymap = KeyMap::Defaults();
  if (flags->help) {
    std::cout << KeysUsage(keymap.Legend());
    return kExitOk;
  }
  if (flags->list_devices) {
    std::cout << FormatDeviceList(ListDevices(flags->input_dir), flags->verbose);
    return kExitOk;
  }
  const bool device_mode = !flags->device.empty();
  ButtonMap buttons;
  if (device_mode) {
    if (flags->profile.empty()) {
      return Usage("--device needs --profile (e.g. clients/keys/profiles/clicker.toml)");
    }
    auto loaded = ButtonMap::FromTomlFile(flags->profile, ButtonMap::EvdevNamer());
    if (!loaded.ok()) return Usage(std::string(loaded.status().message()));
    buttons = *std::move(loaded);
  } else if (!flags->profile.empty()) {
    auto loaded = KeyMap::FromTomlFile(flags->profile);
    if (!loaded.ok()) return Usage(std::string(loaded.status().message()));
    keymap = *std::move(loaded);
  }
  auto token = client::ReadToken(flags->connection.token);
  if (!token.ok()) return Usage(std::string(token.status().message()));
  for (const std::string& w : token->warnings) {
    std::cerr << kProgram << ": warning: " << w << "\n";
  }
  const bool interactive = !flags->stdin_lines && !device_mode;
  const bool calibrate = flags->calibration.calibrate;
  if (calibrate && (isatty(STDIN_FILENO) == 0 || isatty(STDOUT_FILENO) == 0)) {
    return Usage("--calibrate needs a terminal on stdin and stdout (it draws the task there)");
  }
  if (device_mode && !calibrate) {
    sigset_t set;
    sigemptyset(&set);
    for (int sig : {SIGINT, SIGTERM, SIGHUP, SIGUSR1}) sigaddset(&set, sig);
    pthread_sigmask(SIG_BLOCK, &set, nullptr);
  }
  if (interactive && isatty(STDIN_FILENO) == 0) {
    return Usage("stdin is not a terminal; use --stdin-lines to read feedback lines");
  }
  // Before anything starts a thread (creating gRPC credentials starts gRPC's
  // executor threads), so that only the SignalWatcher receives them.
  if (interactive || calibrate) BlockTerminalSignals();
  auto channel = client::ChooseCredentials(flags->connection.channel);
  if (!channel.ok()) return Usage(std::string(channel.status().message()));
  std::string source = interactive ? TtySource() : "stdin";
  if (device_mode) {
    // Stable across re-plugging and event-number changes: the selector.
    source = flags->device;
    if (size_t slash = source.rfind('/'); slash != std::string::npos) source = source.substr(slash + 1);
  }
  const std::string client_id = flags->connection.client_id.empty()
                                    ? client::DefaultClientId(kProgram, source)
                                    : flags->connection.client_id;
  if (absl::Status s = client::ValidateClientId(client_id); !s.ok()) {
    return Usage(std::string(s.message()));
  }

  client::StreamOptions options;
  options.target = flags->connection.channel.target;
  options.token = token->value;
  options.client_id = client_id;
  options.source.kind = device_mode   ? tickmark::v1::SOURCE_KIND_INPUT_DEVICE
                        : interactive ? tickmark::v1::SOURCE_KIND_TERMINAL
                                      : tickmark::v1::SOURCE_KIND_SCRIPT;
  options.source.description = device_mode   ? "input device " + flags->device
                               : interactive ? "keys on /dev/" + source
                                             : "lines on stdin";
  options.source.software = std::string(kProgram) + " " + TICKMARK_VERSION;
  options.credentials = channel->credentials;
  options.clock = SystemMonotonic::Get();
  options.send_realtime = !flags->connection.no_realtime;

  TrainerClient stream;
  if (calibrate) {
    std::unique_ptr<ExternalAnswers> device;
    if (device_mode) {
      auto opened = DeviceAnswers({DeviceSelector{flags->device}, flags->input_dir, flags->grab},
                                  &buttons);
      if (!opened.ok()) {
        std::cerr << kProgram << ": " << opened.status().ToString() << "\n";
        return kExitIncomplete;
      }
      device = *std::move(opened);
    }
    return RunCalibration(stream, std::move(options), flags->calibration, std::move(keymap),
                          device.get());
  }
  if (device_mode) return RunDevice(stream, std::move(options), *flags, buttons);
  const int code = interactive
             ? RunInteractive(stream, std::move(options), std::move(keymap),
                              flags->flush_timeout_s)
             : RunLines(stream, std::move(options), flags->quiet, flags->flush_timeout_s);
  if (flags->verbose) std::fprintf(stderr, "%s", kTerminalReport);
  return code;
}

}  // namespace
}  // namespace tickmark::keys

int main(int argc, char** argv) { return tickmark::keys::Main(argc, argv); }

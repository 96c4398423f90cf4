// tickmark-serial: a trainer source reading a serial response box (line or
// raw protocol, see serial_protocol.h) and sending its presses to tickmarkd
// over a reconnecting Train stream. main() wires flags → profile → port →
// StreamClient; the decoding lives in the library so tests feed it bytes.
#include <fcntl.h>
#include <pthread.h>
#include <signal.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <iostream>
#include <map>
#include <mutex>
#include <string>
#include <thread>
#include <vector>

#include "clients/common/channel.h"
#include "clients/common/client_id.h"
#include "clients/common/monotonic_clock.h"
#include "clients/common/stream_client.h"
#include "clients/common/token.h"
#include "clients/serial/serial_source.h"

#ifndef TICKMARK_VERSION
#define TICKMARK_VERSION "dev"
#endif

namespace tickmark::serial {
namespace {

constexpr char kProgram[] = "tickmark-serial";
constexpr char kDefaultServer[] = "127.0.0.1:7461";

constexpr char kUsage[] =
    R"usage(tickmark-serial: send approve/disapprove feedback from a serial response
box to a tickmark session (a trainer source).

Usage: tickmark-serial --port PATH --profile FILE [flags]

Box
  --port PATH          serial device (/dev/ttyUSB0, /dev/ttyACM0, a pty).
                       Unplugging is survived: the port is reopened when it
                       comes back.
  --profile FILE       TOML: a [serial] table and [[binding]]s mapping box
                       buttons to values; see clients/serial/profiles/
                       (line-box.toml, raw-box.toml).
  --protocol P         line | raw (overrides the profile).
  --baud N             bits per second (profile, else 115200).
  --parity P           none | even | odd.
  --stop-bits S        1 | 1.5 | 2.
  --data-bits N        5..8.
  --no-box-clock       ignore the box's own timestamps; use receive times.

Connection
  --server HOST:PORT   tickmarkd address (default 127.0.0.1:7461)
  --token-file PATH    file holding your trainer token; else TICKMARK_TOKEN.
  --token TOKEN        accepted, with a warning: argv is visible in ps.
  --client-id ID       stable id (default host:user:tickmark-serial:<port>).
  --ca-file PATH       TLS, trusting the CA certificates in PATH.
  --insecure           allow plaintext to a non-loopback host.
  --flush-timeout S    seconds to wait for acknowledgements at exit (10).
  --quiet              print only errors.
  --verbose            one line per event; at exit the timing report.
  --help               this text.

Timing: a line "B1 down 123456" carries the box's clock (µs). That clock is
not the host's, so it is mapped to the host's CLOCK_MONOTONIC (the clock
probes are answered with) by a running minimum of receive time − box time:
the varying delay (USB polling, scheduling) is removed; the minimum transit
stays as a small constant late bias. Lines without a time, and raw bytes,
are stamped with the time read() returned them: later than the press by the
transmission time and USB-serial latency, which is not corrected.

Exit status: 0 when everything sent was acknowledged; 1 otherwise; 2 for
usage and configuration errors. Ctrl-C quits.

tickmark is not a safety system: a robot trained with it needs an
independent emergency stop. Studies with people need ethics-board approval.
)usage";

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
  std::map<std::string, std::string> v = {{"--server", kDefaultServer}};
  std::map<std::string, bool> b;
  const std::vector<std::string> with_value = {
      "--port", "--profile", "--protocol", "--baud", "--parity", "--stop-bits", "--data-bits",
      "--server", "--token-file", "--token", "--client-id", "--ca-file", "--flush-timeout"};
  const std::vector<std::string> switches = {"--no-box-clock", "--insecure", "--quiet",
                                             "--verbose", "--help", "-h"};
  for (int i = 1; i < argc; ++i) {
    std::string a = argv[i];
    std::string val;
    bool has = false;
    if (size_t eq = a.find('='); eq != std::string::npos && a.rfind("--", 0) == 0) {
      val = a.substr(eq + 1);
      a = a.substr(0, eq);
      has = true;
    }
    if (std::find(switches.begin(), switches.end(), a) != switches.end() && !has) {
      b[a] = true;
    } else if (std::find(with_value.begin(), with_value.end(), a) != with_value.end()) {
      if (!has) {
        if (i + 1 >= argc) return Usage(a + " needs a value");
        val = argv[++i];
      }
      if (val.empty()) return Usage(a + " needs a non-empty value");
      v[a] = val;
    } else {
      return Usage("unknown argument \"" + std::string(argv[i]) + "\" (see --help)");
    }
  }
  if (b["--help"] || b["-h"]) {
    std::cout << kUsage;
    return 0;
  }
  if (v["--port"].empty()) return Usage("--port is required (see --help)");
  if (v["--profile"].empty()) return Usage("--profile is required (see clients/serial/profiles/)");
  auto profile = LoadSerialProfile(v["--profile"]);
  if (!profile.ok()) return Usage(std::string(profile.status().message()));
  PortSettings& ps = profile->settings;
  if (v.count("--protocol")) {
    if (v["--protocol"] != "line" && v["--protocol"] != "raw") return Usage("--protocol: line or raw");
    const auto wanted = v["--protocol"] == "raw" ? PortSettings::Protocol::kRaw
                                                 : PortSettings::Protocol::kLine;
    if (wanted != ps.protocol) {
      return Usage("--protocol differs from the profile's; its button names would not fit");
    }
  }
  auto number = [&](const std::string& flag, long lo, long hi, unsigned* out) -> bool {
    if (!v.count(flag)) return true;
    char* end = nullptr;
    const long n = std::strtol(v[flag].c_str(), &end, 10);
    if (*end != '\0' || n < lo || n > hi) return false;
    *out = static_cast<unsigned>(n);
    return true;
  };
  if (!number("--baud", 50, 4'000'000, &ps.baud)) return Usage("--baud: 50..4000000");
  if (!number("--data-bits", 5, 8, &ps.data_bits)) return Usage("--data-bits: 5..8");
  if (v.count("--parity")) {
    if (v["--parity"] != "none" && v["--parity"] != "even" && v["--parity"] != "odd") {
      return Usage("--parity: none, even or odd");
    }
    ps.parity = v["--parity"];
  }
  if (v.count("--stop-bits")) {
    if (v["--stop-bits"] != "1" && v["--stop-bits"] != "1.5" && v["--stop-bits"] != "2") {
      return Usage("--stop-bits: 1, 1.5 or 2");
    }
    ps.stop_bits = v["--stop-bits"];
  }
  if (b["--no-box-clock"]) ps.box_clock = false;
  double flush_timeout_s = 10;
  if (v.count("--flush-timeout")) flush_timeout_s = std::atof(v["--flush-timeout"].c_str());

  auto token = client::ReadToken({v["--token-file"], v["--token"]});
  if (!token.ok()) return Usage(std::string(token.status().message()));
  for (const std::string& w : token->warnings) std::cerr << kProgram << ": warning: " << w << "\n";

  // Block the quit signals before gRPC starts threads; one thread sigwaits.
  sigset_t set;
  sigemptyset(&set);
  for (int sig : {SIGINT, SIGTERM, SIGHUP, SIGUSR1}) sigaddset(&set, sig);
  pthread_sigmask(SIG_BLOCK, &set, nullptr);

  auto channel = client::ChooseCredentials({v["--server"], b["--insecure"], v["--ca-file"]});
  if (!channel.ok()) return Usage(std::string(channel.status().message()));
  std::string source = v["--port"];
  if (size_t slash = source.rfind('/'); slash != std::string::npos) source = source.substr(slash + 1);
  const std::string client_id =
      v["--client-id"].empty() ? client::DefaultClientId(kProgram, source) : v["--client-id"];
  if (absl::Status s = client::ValidateClientId(client_id); !s.ok()) {
    return Usage(std::string(s.message()));
  }
  client::StreamOptions options;
  options.target = v["--server"];
  options.token = token->value;
  options.client_id = client_id;
  options.source = {tickmark::v1::SOURCE_KIND_SERIAL, "serial box on " + v["--port"],
                    std::string(kProgram) + " " + TICKMARK_VERSION};
  options.credentials = channel->credentials;
  options.clock = client::SystemMonotonic::Get();

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
  const bool quiet = b["--quiet"];
  const bool verbose = b["--verbose"];
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
  int code = 2;
  if (absl::Status s = stream.Connect(std::move(options), std::move(cb)); !s.ok()) {
    std::fprintf(stderr, "%s: %s\n", kProgram, s.ToString().c_str());
  } else {
    SerialSource port(v["--port"], ps);
    if (absl::Status s2 = port.Open(); !s2.ok()) {
      std::fprintf(stderr, "%s: %s; waiting for the port\n", kProgram, s2.ToString().c_str());
    }
    const keys::ButtonMap& map = profile->buttons;
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

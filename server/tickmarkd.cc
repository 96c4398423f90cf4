// tickmarkd: flags and config file -> TickmarkServer -> run until SIGINT or
// SIGTERM. Nothing else lives here.
#include <signal.h>

#include <iostream>

#include <toml++/toml.h>

#include "server/base/flags.h"
#include "server/base/log.h"
#include "server/rpc/server.h"

namespace {

constexpr char kSafety[] =
    "Safety: tickmark is not a safety system. A robot trained or driven with it needs an\n"
    "independent emergency stop; studies with people need approval from your ethics board\n"
    "and participant data protection under local rules.";

// Applies a TOML config file to options; command-line flags win.
bool ApplyConfig(const std::string& path, const tickmark::FlagSet& flags,
                 tickmark::rpc::ServerOptions* o, std::string* log_level, std::string* durability,
                 std::string* default_kernel, int64_t* udp_probe_port) {
  toml::table t;
  try {
    t = toml::parse_file(path);
  } catch (const toml::parse_error& e) {
    std::cerr << "tickmarkd: " << path << ": " << e.description() << " at line "
              << e.source().begin.line << "\n";
    return false;
  }
  auto str = [&](const char* key, const char* flag, std::string* out) {
    if (auto v = t[key].value<std::string>(); v && !flags.WasSet(flag)) *out = *v;
  };
  str("listen", "listen", &o->listen);
  str("data_dir", "data-dir", &o->data_dir);
  str("ledger", "ledger", &o->ledger_path);
  str("log_level", "log-level", log_level);
  str("durability", "durability", durability);
  str("tls_cert", "tls-cert", &o->tls_cert_file);
  str("tls_key", "tls-key", &o->tls_key_file);
  str("default_kernel", "default-kernel", default_kernel);
  if (auto v = t["probes"]["burst"].value<int64_t>(); v && !flags.WasSet("probe-burst")) {
    o->live.probe_burst = static_cast<int>(*v);
  }
  if (auto v = t["probes"]["interval_ms"].value<int64_t>(); v && !flags.WasSet("probe-interval-ms")) {
    o->live.probe_interval = tickmark::Duration::Millis(*v);
  }
  if (auto v = t["udp_probe_port"].value<int64_t>(); v && !flags.WasSet("udp-probe-port")) {
    *udp_probe_port = *v;
  }
  if (auto v = t["limits"]["max_state_bytes"].value<int64_t>(); v && !flags.WasSet("max-state-bytes")) {
    o->live.limits.max_state_bytes = static_cast<uint32_t>(*v);
  }
  if (auto v = t["limits"]["max_event_age_s"].value<int64_t>(); v && !flags.WasSet("max-event-age-s")) {
    o->live.limits.max_event_age = tickmark::Duration::Seconds(*v);
  }
  return true;
}

}  // namespace

int main(int argc, char** argv) {
  tickmark::SetLogTag("tickmarkd");
  tickmark::rpc::ServerOptions options;
  std::string config, log_level = "info", durability = "process";
  int64_t probe_burst = options.live.probe_burst;
  int64_t probe_interval_ms = options.live.probe_interval.nanos() / 1'000'000;
  int64_t max_state_bytes = options.live.limits.max_state_bytes;
  int64_t max_event_age_s = options.live.limits.max_event_age.nanos() / 1'000'000'000;
  bool allow_insecure_remote = false;
  int64_t udp_probe_port = 0;
  std::string default_kernel = "uniform:0.2,4.0";
  int64_t allowed_lateness_ms = options.sessions.allowed_lateness.nanos() / 1'000'000;

  tickmark::FlagSet flags(
      "tickmarkd",
      "The tickmark server: takes feedback from trainers and steps from agents over gRPC,\n"
      "times them on one session timeline and keeps everything in a ledger (SQLite).");
  flags.String("listen", &options.listen, "HOST:PORT for gRPC (port 0 picks a free port)");
  flags.String("data-dir", &options.data_dir, "folder for tickmark.db and operator.token");
  flags.String("ledger", &options.ledger_path, "ledger file (default DATA_DIR/tickmark.db)");
  flags.String("config", &config, "TOML config file (flags given here win)");
  flags.String("log-level", &log_level, "debug, info, warning or error");
  flags.String("durability", &durability,
               "'process': acknowledged records survive the server being killed (SQLite WAL, "
               "synchronous=NORMAL); 'power': also power loss (synchronous=FULL, slower)");
  flags.String("tls-cert", &options.tls_cert_file, "PEM certificate chain for TLS");
  flags.String("tls-key", &options.tls_key_file, "PEM private key for TLS");
  flags.Bool("allow-insecure-remote", &allow_insecure_remote,
             "allow plaintext on a non-loopback address (trusted networks only)");
  flags.Int("probe-burst", &probe_burst, "clock probes sent right after a client connects");
  flags.Int("probe-interval-ms", &probe_interval_ms, "clock probe period afterwards");
  flags.Int("udp-probe-port", &udp_probe_port,
            "UDP port on the --listen host where clients may start their own clock probes, "
            "for LAN-grade timing (0: off; see DEVELOPERS.md, UDP probe port)");
  flags.Int("max-state-bytes", &max_state_bytes, "largest step state payload accepted");
  flags.Int("max-event-age-s", &max_event_age_s,
            "oldest event time accepted, in seconds before arrival");
  flags.String("default-kernel", &default_kernel,
               "delay kernel of sessions that name none (uniform:MIN,MAX, gamma:SHAPE,SCALE[,SHIFT], "
               "exponential:RATE[,SHIFT]; seconds)");
  flags.Int("allowed-lateness-ms", &allowed_lateness_ms,
            "how late a record may arrive and still be credited; fixed per session at creation");
  flags.Epilog(std::string("The operator token (for the tickmark CLI) is written to\n"
                           "DATA_DIR/operator.token on first start.\n\n") +
               kSafety);
  if (auto r = flags.Parse(argc, argv); r != tickmark::FlagSet::kOk) {
    return r == tickmark::FlagSet::kHelp ? 0 : 2;
  }
  if (!flags.args().empty()) {
    std::cerr << "tickmarkd: unexpected argument '" << flags.args()[0] << "' (see --help)\n";
    return 2;
  }
  if (!config.empty() && !ApplyConfig(config, flags, &options, &log_level, &durability,
                                      &default_kernel, &udp_probe_port)) {
    return 2;
  }
  if (udp_probe_port < 0 || udp_probe_port > 65535) {
    std::cerr << "tickmarkd: --udp-probe-port must be 0..65535\n";
    return 2;
  }
  options.udp_probe = udp_probe_port != 0;
  options.udp_probe_port = static_cast<uint16_t>(udp_probe_port);
  if (flags.WasSet("probe-burst")) options.live.probe_burst = static_cast<int>(probe_burst);
  if (flags.WasSet("probe-interval-ms")) {
    options.live.probe_interval = tickmark::Duration::Millis(probe_interval_ms);
  }
  if (flags.WasSet("max-state-bytes")) {
    options.live.limits.max_state_bytes = static_cast<uint32_t>(max_state_bytes);
  }
  if (flags.WasSet("max-event-age-s")) {
    options.live.limits.max_event_age = tickmark::Duration::Seconds(max_event_age_s);
  }
  options.allow_insecure_remote = allow_insecure_remote;
  {
    std::string error;
    auto kernel = tickmark::DelayKernel::Parse(default_kernel, &error);
    if (!kernel) {
      std::cerr << "tickmarkd: --default-kernel: " << error << "\n";
      return 2;
    }
    options.sessions.default_kernel = *kernel;
  }
  if (allowed_lateness_ms < 0 || allowed_lateness_ms > 3'600'000) {
    std::cerr << "tickmarkd: --allowed-lateness-ms must be 0..3600000\n";
    return 2;
  }
  options.sessions.allowed_lateness = tickmark::Duration::Millis(allowed_lateness_ms);
  auto level = tickmark::ParseLogLevel(log_level);
  if (!level) {
    std::cerr << "tickmarkd: --log-level must be debug, info, warning or error\n";
    return 2;
  }
  tickmark::SetLogLevel(*level);
  if (durability != "process" && durability != "power") {
    std::cerr << "tickmarkd: --durability must be 'process' or 'power'\n";
    return 2;
  }
  options.durable_power_loss = durability == "power";
  if (options.live.probe_burst < 1 || options.live.probe_interval < tickmark::Duration::Millis(10)) {
    std::cerr << "tickmarkd: --probe-burst must be >= 1 and --probe-interval-ms >= 10\n";
    return 2;
  }

  // Signals are taken synchronously by one thread, so every other thread
  // (gRPC's, the ledger's) must start with them blocked.
  sigset_t signals;
  sigemptyset(&signals);
  sigaddset(&signals, SIGINT);
  sigaddset(&signals, SIGTERM);
  pthread_sigmask(SIG_BLOCK, &signals, nullptr);

  auto server = tickmark::rpc::TickmarkServer::Start(options);
  if (!server.ok()) {
    TM_LOG(kError) << server.status().message();
    return 1;
  }
  TM_LOG(kInfo) << "listening on " << options.listen.substr(0, options.listen.rfind(':')) << ":"
                << (*server)->port() << "; ledger " << (*server)->ledger_path()
                << "; operator token in " << (*server)->operator_token_path();
  // Machine-readable line for scripts that start us with port 0.
  std::cout << "tickmarkd listening port=" << (*server)->port() << std::endl;

  int sig = 0;
  sigwait(&signals, &sig);
  TM_LOG(kInfo) << "signal " << sig << ": stopping (draining streams, committing the ledger)";
  (*server)->Shutdown(tickmark::Duration::Seconds(5));
  TM_LOG(kInfo) << "stopped cleanly";
  return 0;
}

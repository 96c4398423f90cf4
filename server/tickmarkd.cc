// tickmarkd: flags and config file -> TickmarkServer -> run until SIGINT or
// SIGTERM. Nothing else lives here.
//
// Every flag is one line in AddServerFlags, bound straight to the field of
// ServerOptions it sets; the field's initial value is the default shown in
// --help, and the flag's long name is also its key in the --config file.
#include <signal.h>

#include <iostream>

#include "server/base/flags.h"
#include "server/base/log.h"
#include "server/core/delay_kernel.h"
#include "server/net/address.h"
#include "server/ops/metrics.h"
#include "server/ops/metrics_http_server.h"
#include "server/rpc/server.h"
#include "server/web/web_bridge.h"

namespace {

using tickmark::Duration;

constexpr char kSafety[] =
    "Safety: tickmark is not a safety system. A robot trained or driven with it needs an\n"
    "independent emergency stop; studies with people need approval from your ethics board\n"
    "and participant data protection under local rules.";

// A flag holding a whole number of `unit` (Duration::Millis or ::Seconds)
// in [lo, hi], stored as a Duration.
CLI::Option* AddDuration(CLI::App& app, const std::string& name, Duration* field,
                         Duration (*unit)(int64_t), int64_t lo, int64_t hi,
                         const std::string& help) {
  const int64_t per_unit = unit(1).nanos();
  return app
      .add_option_function<int64_t>(
          name, [field, unit](const int64_t& v) { *field = unit(v); }, help)
      ->default_str(std::to_string(field->nanos() / per_unit))
      ->check(CLI::Range(lo, hi));
}

// Accepts a delay kernel's text form; the message names what is wrong.
CLI::Validator KernelText() {
  return CLI::Validator(
      [](std::string& text) {
        std::string error;
        return tickmark::DelayKernel::Parse(text, &error) ? std::string() : error;
      },
      "");
}

void AddServerFlags(CLI::App& app, tickmark::rpc::ServerOptions& o, std::string& log_level) {
  app.add_option("--listen", o.listen, "HOST:PORT for gRPC (port 0 picks a free port)");
  app.add_option("--data-dir", o.data_dir, "folder for tickmark.db and operator.token");
  app.add_option("--ledger", o.ledger_path,
                 "ledger file (default DATA_DIR/tickmark.db), or a PostgreSQL database "
                 "(postgresql://USER@HOST:PORT/DB) that several instances may share");
  // Several instances on one PostgreSQL database (docs/architecture.md,
  // "More than one machine").
  app.add_option("--advertise", o.advertise,
                 "HOST:PORT where clients reach this instance directly, told to clients of "
                 "sessions it owns (PostgreSQL ledger; default: --listen)");
  app.add_option("--instance-id", o.instance_id,
                 "this instance's name in the lease table (default: host:pid:random)");
  AddDuration(app, "--lease-ms", &o.lease, Duration::Millis, 200, 600'000,
              "a session's lease on a PostgreSQL ledger: another instance takes the session "
              "over this long after its owner stops renewing");
  app.add_option("--log-level", log_level, "debug, info, warning or error")
      ->check(CLI::IsMember({"debug", "info", "warning", "error"}));
  app.add_option_function<std::string>(
         "--durability", [&o](const std::string& v) { o.durable_power_loss = v == "power"; },
         "'process': acknowledged records survive the server being killed (SQLite WAL, "
         "synchronous=NORMAL); 'power': also power loss (synchronous=FULL, slower)")
      ->check(CLI::IsMember({"process", "power"}))
      ->default_str(o.durable_power_loss ? "power" : "process");
  CLI::Option* cert =
      app.add_option("--tls-cert", o.tls_cert_file, "PEM certificate chain for TLS");
  CLI::Option* key = app.add_option("--tls-key", o.tls_key_file, "PEM private key for TLS");
  cert->needs(key);
  key->needs(cert);
  app.add_flag("--allow-insecure-remote", o.allow_insecure_remote,
               "allow plaintext on a non-loopback address (trusted networks only)");
  app.add_option("--probe-burst", o.live.probe_burst,
                 "clock probes sent right after a client connects (with adaptive probing off)")
      ->check(CLI::Range(1, 1000));
  AddDuration(app, "--probe-interval-ms", &o.live.probe_interval, Duration::Millis, 10, 3'600'000,
              "clock probe period once a client's clock model meets its targets");
  // Adaptive probing and the drift prior (docs/time-model.md).
  app.add_flag("--adaptive-probing", o.live.probing.adaptive,
               "probe fast while a client's clock model is young or loose (on by default; "
               "=false: a burst, then --probe-interval-ms)")
      // A flag's default is not captured: without this --print-config said false.
      ->default_str(o.live.probing.adaptive ? "true" : "false");
  AddDuration(app, "--probe-fast-for-ms", &o.live.probing.fast_for, Duration::Millis, 0, 600'000,
              "how long after a client connects (or its clock steps) it is probed fast");
  AddDuration(app, "--probe-fast-interval-ms", &o.live.probing.fast_interval, Duration::Millis, 1,
              60'000, "probe period while fast");
  AddDuration(app, "--probe-boost-interval-ms", &o.live.probing.boost_interval, Duration::Millis, 1,
              3'600'000, "probe period while a clock model misses a target");
  AddDuration(app, "--probe-boost-within-ms", &o.live.probing.boost_within, Duration::Millis, 0,
              86'400'000, "boost a clock model's probing only this long after it starts");
  AddDuration(app, "--probe-target-us", &o.live.probing.target_scatter, Duration::Micros, 1,
              10'000'000, "target for a clock model's offset scatter (microseconds)");
  app.add_option("--probe-target-drift-ppm", o.live.probing.target_drift_ppm,
                 "target for a clock model's drift error bound (ppm)")
      ->check(tickmark::Between(0.001, 10'000));
  AddDuration(app, "--probe-min-interval-ms", &o.live.probing.min_interval, Duration::Millis, 1,
              3'600'000, "per client: never probe more often than this");
  app.add_option("--probe-budget", o.live.probe_budget,
                 "probes per second for all clients together; past it a client is probed less "
                 "often, down to one probe per --probe-max-interval-ms (0: no limit)")
      ->check(tickmark::Between(0, 1e6));
  AddDuration(app, "--probe-max-interval-ms", &o.live.probing.max_interval, Duration::Millis, 10,
              3'600'000,
              "per client: probe at least this often, whatever the budget (at least "
              "--probe-interval-ms)");
  app.add_option("--drift-prior-ppm", o.live.clock.drift_prior_ppm,
                 "assumed bound on a client clock's rate error until its drift is measured "
                 "better (ppm)")
      ->check(tickmark::Between(1, 500));
  app.add_option_function<int>(
         "--udp-probe-port",
         [&o](const int& port) {
           o.udp_probe = port != 0;
           o.udp_probe_port = static_cast<uint16_t>(port);
         },
         "UDP port on the --listen host where clients may start their own clock probes, "
         "for LAN-grade timing (0: off; see DEVELOPERS.md, UDP probe port)")
      ->default_str("0")
      ->check(CLI::Range(0, 65535));
  app.add_flag("--no-realtime-mapping", o.no_realtime_mapping,
               "never map event times through real time, even when this host's and a client's "
               "clocks are disciplined by NTP/PTP (see docs/time-model.md, Disciplined clocks)");
  app.add_option("--max-state-bytes", o.live.limits.max_state_bytes,
                 "largest step state payload accepted")
      ->check(CLI::Range(uint32_t{1}, uint32_t{64} << 20));
  AddDuration(app, "--max-event-age-s", &o.live.limits.max_event_age, Duration::Seconds, 1,
              31'536'000, "oldest event time accepted, in seconds before arrival");
  app.add_option_function<std::string>(
         "--default-kernel",
         [&o](const std::string& v) {
           o.sessions.default_kernel = *tickmark::DelayKernel::Parse(v);
         },
         "delay kernel of sessions that name none (uniform:MIN,MAX, gamma:SHAPE,SCALE[,SHIFT], "
         "exponential:RATE[,SHIFT]; seconds)")
      ->type_name("KERNEL")
      ->default_str("uniform:0.2,4.0")
      ->check(KernelText());
  AddDuration(app, "--allowed-lateness-ms", &o.sessions.allowed_lateness, Duration::Millis, 0,
              3'600'000,
              "how late a record may arrive and still be credited; fixed per session at creation");

  // The ledger at start and when the disk fills (DEVELOPERS.md, "Failure
  // states and recovery").
  app.add_flag("--new-ledger", o.new_ledger,
               "start an empty ledger although the data folder shows one existed (an old WAL "
               "file is kept aside as tickmark.db-wal.replaced)");
  app.add_flag("--accept-lost-records", o.accept_lost_records,
               "start although the ledger holds fewer records than were committed (lost WAL "
               "frames); the loss is logged");
  app.add_option("--ledger-reserve-bytes", o.ledger_reserve_bytes,
                 "space kept in a reserve file beside the ledger, freed when the disk fills so "
                 "the server can still record it (0: no reserve)")
      ->check(CLI::Range(uint64_t{0}, uint64_t{1} << 32));

  // Hostile or broken clients (DEVELOPERS.md, "Limits on clients").
  AddDuration(app, "--hello-timeout-ms", &o.live.hello_timeout, Duration::Millis, 100, 600'000,
              "a stream that sends no hello this long after opening is ended");
  app.add_option("--max-streams", o.live.max_streams,
                 "open streams in total (0: no cap); past it new streams are refused")
      ->check(CLI::Range(size_t{0}, size_t{10'000'000}));
  app.add_option("--max-streams-per-peer", o.live.max_streams_per_peer,
                 "open streams per client host (0: no cap)")
      ->check(CLI::Range(size_t{0}, size_t{10'000'000}));
  app.add_option("--feedback-rate", o.live.feedback_rate,
                 "feedback per second per trainer token and per stream (0: no limit)")
      ->check(tickmark::Between(0, 1e9));
  app.add_option("--feedback-burst", o.live.feedback_burst,
                 "feedback a trainer may send at once above --feedback-rate")
      ->check(tickmark::Between(1, 1e9));
  app.add_option("--step-rate", o.live.step_rate,
                 "steps per second per agent token and per stream (0: no limit)")
      ->check(tickmark::Between(0, 1e9));
  app.add_option("--step-burst", o.live.step_burst,
                 "steps an agent may send at once above --step-rate")
      ->check(tickmark::Between(1, 1e9));
  app.add_option("--max-in-flight-per-stream", o.live.max_in_flight_per_stream,
                 "messages a stream may have waiting for their acks before it is read again")
      ->check(CLI::Range(size_t{1}, size_t{1'000'000}));
  app.add_option("--live-workers", o.live.worker_threads,
                 "threads that run stream work and the ledger look-ups streams need")
      ->check(CLI::Range(1, 256));
}

// The web port (docs/web.md). It shares --tls-cert, --tls-key and
// --allow-insecure-remote with gRPC; main() copies them across.
void AddWebFlags(CLI::App& app, tickmark::web::WebOptions& w) {
  app.add_option("--http-listen", w.http_listen,
                 "HOST:PORT for the web page, live view and join links (HTTPS with --tls-cert; "
                 "empty: off; see docs/web.md)");
  app.add_option("--http-public-url", w.http_public_url,
                 "how browsers reach the web port, for invite links (https://HOST:PORT; default: "
                 "from --http-listen)");
  app.add_flag("--http-metrics", w.http_metrics,
               "serve Prometheus metrics at /metrics on the web port (on by default; =false: "
               "off; see docs/operations.md)")
      ->default_str(w.http_metrics ? "true" : "false");  // for --print-config
  app.add_option("--http-max-connections", w.http.max_connections, "open web connections in total")
      ->check(CLI::Range(size_t{1}, size_t{1'000'000}));
  app.add_option("--http-max-connections-per-peer", w.http.max_connections_per_peer,
                 "open web connections per client address")
      ->check(CLI::Range(size_t{1}, size_t{1'000'000}));
}

}  // namespace

int main(int argc, char** argv) {
  tickmark::SetLogTag("tickmarkd");
  tickmark::rpc::ServerOptions options;
  std::string log_level = "info";
  CLI::App app(
      "The tickmark server: takes feedback from trainers and steps from agents over gRPC,\n"
      "times them on one session timeline and keeps everything in a ledger (SQLite, or a "
      "PostgreSQL database several instances share).",
      "tickmarkd");
  tickmark::ConfigureApp(app,
                         std::string("The operator token (for the tickmark CLI) is written to\n"
                                     "DATA_DIR/operator.token on first start.\n\n") +
                             kSafety);
  tickmark::AddTomlConfig(app,
                          "TOML config file: keys are the long flag names (listen = "
                          "\"0.0.0.0:7461\"); flags given here win");
  AddServerFlags(app, options, log_level);
  tickmark::web::WebOptions web;
  AddWebFlags(app, web);
  std::string metrics_listen;
  app.add_option("--metrics-listen", metrics_listen,
                 "HOST:PORT of a plaintext port serving only Prometheus metrics at /metrics "
                 "(empty: off; loopback unless --allow-insecure-remote; see docs/operations.md)");
  if (auto exit = tickmark::ParseCommandLine(app, argc, argv)) return *exit;
  tickmark::SetLogLevel(*tickmark::ParseLogLevel(log_level));

  // Signals are taken synchronously by one thread, so every other thread
  // (gRPC's, the ledger's) must start with them blocked.
  sigset_t signals;
  sigemptyset(&signals);
  sigaddset(&signals, SIGINT);
  sigaddset(&signals, SIGTERM);
  pthread_sigmask(SIG_BLOCK, &signals, nullptr);

  web.tls_cert_file = options.tls_cert_file;
  web.tls_key_file = options.tls_key_file;
  web.allow_insecure_remote = options.allow_insecure_remote;
  web.max_abs_value = options.live.limits.max_abs_value;
  // Outlives the server: the admin service asks it for invites.
  tickmark::web::WebBridge bridge(web);
  if (bridge.enabled()) options.invites = &bridge;

  // The metrics port is checked before anything starts, so a bad address
  // fails fast; it is opened after the server (its metrics exist by then).
  if (!metrics_listen.empty() && !tickmark::net::IsLoopbackTarget(metrics_listen) &&
      !options.allow_insecure_remote) {
    TM_LOG(kError) << "refusing plaintext metrics on " << metrics_listen
                   << ": use a loopback address, or --allow-insecure-remote on a trusted network";
    return 1;
  }
  auto server = tickmark::rpc::TickmarkServer::Start(options);
  if (!server.ok()) {
    TM_LOG(kError) << server.status().message();
    return 1;
  }
  if (absl::Status st = bridge.Start(server->get()); !st.ok()) {
    TM_LOG(kError) << st.message();
    (*server)->Shutdown(tickmark::Duration::Zero());
    return 1;
  }
  std::unique_ptr<tickmark::ops::MetricsHttpServer> metrics;
  if (!metrics_listen.empty()) {
    auto started = tickmark::ops::MetricsHttpServer::Start(
        metrics_listen, [] { return tickmark::ops::Registry::Default().Render(); });
    if (!started.ok()) {
      TM_LOG(kError) << started.status().message();
      bridge.Stop(tickmark::Duration::Zero());
      (*server)->Shutdown(tickmark::Duration::Zero());
      return 1;
    }
    metrics = std::move(*started);
  }
  TM_LOG(kInfo) << "listening on " << options.listen.substr(0, options.listen.rfind(':')) << ":"
                << (*server)->port() << "; ledger " << (*server)->ledger_path()
                << "; operator token in " << (*server)->operator_token_path();
  // Machine-readable line for scripts that start us with port 0.
  std::cout << "tickmarkd listening port=" << (*server)->port() << std::endl;
  if (bridge.enabled()) {
    // The same for the web port, after the gRPC line (scripts read that first).
    std::cout << "tickmarkd web port=" << bridge.port() << " url=" << bridge.base_url()
              << std::endl;
  }
  if (metrics) std::cout << "tickmarkd metrics port=" << metrics->port() << std::endl;

  int sig = 0;
  sigwait(&signals, &sig);
  TM_LOG(kInfo) << "signal " << sig << ": stopping (draining streams, committing the ledger)";
  if (metrics) metrics->Stop();
  bridge.Stop(tickmark::Duration::Seconds(5));
  (*server)->Shutdown(tickmark::Duration::Seconds(5));
  TM_LOG(kInfo) << "stopped cleanly";
  return 0;
}

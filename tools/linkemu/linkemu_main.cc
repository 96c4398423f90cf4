// tickmark-linkemu: runs one TCP or UDP delay proxy until SIGINT/SIGTERM,
// then prints its counters. main() only wires flags to a proxy.
#include <csignal>
#include <cstdio>
#include <iostream>
#include <optional>
#include <string>

#include <boost/asio/io_context.hpp>
#include <boost/asio/signal_set.hpp>

#include "server/base/flags.h"
#include "tools/linkemu/link_profile.h"
#include "tools/linkemu/proxy_config.h"
#include "tools/linkemu/tcp_delay_proxy.h"
#include "tools/linkemu/udp_delay_proxy.h"

namespace {

using tickmark::Duration;
namespace le = tickmark::linkemu;

constexpr char kDescription[] =
    "Emulates a network link on loopback: a proxy that delays (TCP, UDP) and\n"
    "loses (UDP only) traffic between its clients and one target.";

constexpr char kFooter[] =
    "Addresses are numeric (or \"localhost\"); IPv6 as [::1]:PORT.\n"
    "Prints \"listening HOST:PORT\" once ready; counters on exit.";

int Fail(const std::string& message) {
  std::cerr << "tickmark-linkemu: " << message << " (see tickmark-linkemu --help)\n";
  return tickmark::kExitUsage;
}

// Accepts HOST:PORT or [V6]:PORT (numeric; see proxy_config.h).
CLI::Validator HostPortText() {
  return CLI::Validator(
      [](std::string& text) {
        return le::ParseHostPort(text) ? std::string() : "bad address " + text;
      },
      "");
}

// A flag in milliseconds (0..1e9, fractions allowed) stored as a Duration.
CLI::Option* AddMillis(CLI::App& app, const std::string& name, Duration* field,
                       const std::string& help) {
  return app
      .add_option_function<double>(
          name, [field](const double& ms) { *field = Duration::FromSeconds(ms / 1000.0); },
          help)
      ->type_name("MS")
      ->default_str("0")
      ->check(tickmark::Between(0, 1e9));
}

void PrintCounters(const le::LinkCounters& c) {
  auto line = [](const char* name, const le::DirectionCounters& d) {
    std::cout << name << ": received " << d.received_chunks << " chunks / "
              << d.received_bytes << " bytes, delivered " << d.delivered_chunks
              << " chunks / " << d.delivered_bytes << " bytes, dropped "
              << d.dropped_chunks << " chunks\n";
  };
  line("forward", c.forward);
  line("backward", c.backward);
  std::cout << "connections " << c.connections << ", refused " << c.refused << "\n";
}

}  // namespace

int main(int argc, char** argv) {
  le::ProxyConfig config;
  bool udp = false;
  std::string listen = le::ToString(config.listen);
  std::string target;
  Duration jitter;
  std::string jitter_kind = "uniform";
  double loss = 0.0;

  CLI::App app(kDescription, "tickmark-linkemu");
  tickmark::ConfigureApp(app, kFooter);
  app.add_option("--listen", listen,
                 "HOST:PORT where clients connect (port 0 lets the kernel pick one)")
      ->type_name("ADDR")
      ->check(HostPortText());
  app.add_option("--target", target, "HOST:PORT of the real server")
      ->type_name("ADDR")
      ->required()
      ->check(HostPortText());
  app.add_flag("--udp", udp, "relay datagrams instead of a TCP stream");
  AddMillis(app, "--forward-delay-ms", &config.profile.forward_delay,
            "one-way delay client->server");
  AddMillis(app, "--backward-delay-ms", &config.profile.backward_delay,
            "one-way delay server->client");
  AddMillis(app, "--jitter-ms", &jitter, "jitter amount, both directions");
  app.add_option("--jitter", jitter_kind, "uniform: +-MS; normal: sigma MS")
      ->check(CLI::IsMember({"uniform", "normal"}));
  app.add_option("--loss", loss,
                 "datagram loss probability, both directions (ignored for TCP)")
      ->type_name("P")
      ->check(tickmark::Between(0, 1));
  app.add_option("--seed", config.profile.seed, "seed of every random draw");
  app.add_flag("--allow-non-loopback", config.allow_non_loopback,
               "permit addresses other than loopback");
  if (auto exit = tickmark::ParseCommandLine(app, argc, argv)) return *exit;
  config.listen = *le::ParseHostPort(listen);
  config.target = *le::ParseHostPort(target);

  const le::Jitter j = jitter_kind == "normal" ? le::Jitter::Normal(jitter)
                                               : le::Jitter::Uniform(jitter);
  config.profile.forward_jitter = j;
  config.profile.backward_jitter = j;
  config.profile.forward_loss = loss;
  config.profile.backward_loss = loss;
  if (!udp && loss > 0.0) {
    std::cerr << "tickmark-linkemu: --loss is ignored for TCP (a stream cannot "
                 "lose bytes)\n";
  }

  // Installed before the proxy starts, so an early SIGINT ends the run
  // through the counters below instead of the default action.
  boost::asio::io_context io;
  boost::asio::signal_set signals(io, SIGINT, SIGTERM);
  signals.async_wait([](const boost::system::error_code&, int) {});

  std::optional<le::TcpDelayProxy> tcp;
  std::optional<le::UdpDelayProxy> udp_proxy;
  boost::system::error_code ec;
  uint16_t port = 0;
  if (udp) {
    udp_proxy.emplace(config);
    ec = udp_proxy->Start();
    port = udp_proxy->port();
  } else {
    tcp.emplace(config);
    ec = tcp->Start();
    port = tcp->port();
  }
  if (ec) {
    if (ec == boost::system::errc::permission_denied) {
      return Fail("refusing a non-loopback address without --allow-non-loopback");
    }
    return Fail("cannot start: " + ec.message());
  }
  le::HostPort listening = config.listen;
  listening.port = port;
  std::cout << "listening " << le::ToString(listening) << " -> "
            << le::ToString(config.target) << (udp ? " udp" : " tcp") << std::endl;

  io.run();  // returns once a signal arrived

  const le::LinkCounters counters = udp ? udp_proxy->counters() : tcp->counters();
  if (udp) {
    udp_proxy->Stop();
  } else {
    tcp->Stop();
  }
  PrintCounters(counters);
  return 0;
}

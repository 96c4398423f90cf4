// tickmark-linkemu: runs one TCP or UDP delay proxy until SIGINT/SIGTERM,
// then prints its counters. main() only wires flags to a proxy.
#include <csignal>
#include <cstdio>
#include <cstdlib>
#include <iostream>
#include <optional>
#include <string>
#include <string_view>

#include <boost/asio/io_context.hpp>
#include <boost/asio/signal_set.hpp>

#include "tools/linkemu/link_profile.h"
#include "tools/linkemu/proxy_config.h"
#include "tools/linkemu/tcp_delay_proxy.h"
#include "tools/linkemu/udp_delay_proxy.h"

namespace {

using tickmark::Duration;
namespace le = tickmark::linkemu;

constexpr char kUsage[] = R"(usage: tickmark-linkemu --target HOST:PORT [options]

Emulates a network link on loopback: a proxy that delays (TCP, UDP) and
loses (UDP only) traffic between its clients and one target.

  --listen HOST:PORT        where clients connect (default 127.0.0.1:0;
                            port 0 lets the kernel pick one)
  --target HOST:PORT        the real server (required)
  --udp                     relay datagrams instead of a TCP stream
  --forward-delay-ms MS     one-way delay client->server (default 0)
  --backward-delay-ms MS    one-way delay server->client (default 0)
  --jitter-ms MS            jitter amount, both directions (default 0)
  --jitter uniform|normal   uniform: +-MS; normal: sigma MS (default uniform)
  --loss P                  datagram loss probability, both directions,
                            0..1 (default 0; ignored for TCP)
  --seed N                  seed of every random draw (default 1)
  --allow-non-loopback      permit addresses other than loopback
  --help                    this text

Addresses are numeric (or "localhost"); IPv6 as [::1]:PORT.
Prints "listening HOST:PORT" once ready; counters on exit.
)";

// Parses a non-negative finite number of milliseconds.
std::optional<Duration> ParseMillis(const std::string& text) {
  char* end = nullptr;
  const double ms = std::strtod(text.c_str(), &end);
  if (text.empty() || *end != '\0' || !(ms >= 0.0) || ms > 1e9) return std::nullopt;
  return Duration::FromSeconds(ms / 1000.0);
}

int Fail(const std::string& message) {
  std::cerr << "tickmark-linkemu: " << message << "\n(see --help)\n";
  return 2;
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
  bool have_target = false;
  Duration jitter;
  std::string jitter_kind = "uniform";
  double loss = 0.0;

  for (int i = 1; i < argc; ++i) {
    const std::string_view flag = argv[i];
    if (flag == "--help" || flag == "-h") {
      std::cout << kUsage;
      return 0;
    }
    if (flag == "--udp") {
      udp = true;
      continue;
    }
    if (flag == "--allow-non-loopback") {
      config.allow_non_loopback = true;
      continue;
    }
    if (i + 1 >= argc) return Fail("missing value for " + std::string(flag));
    const std::string value = argv[++i];
    if (flag == "--listen" || flag == "--target") {
      auto hp = le::ParseHostPort(value);
      if (!hp) return Fail("bad address " + value + " for " + std::string(flag));
      if (flag == "--listen") {
        config.listen = *hp;
      } else {
        config.target = *hp;
        have_target = true;
      }
    } else if (flag == "--forward-delay-ms" || flag == "--backward-delay-ms" ||
               flag == "--jitter-ms") {
      auto d = ParseMillis(value);
      if (!d) return Fail("bad duration " + value + " for " + std::string(flag));
      if (flag == "--forward-delay-ms") {
        config.profile.forward_delay = *d;
      } else if (flag == "--backward-delay-ms") {
        config.profile.backward_delay = *d;
      } else {
        jitter = *d;
      }
    } else if (flag == "--jitter") {
      if (value != "uniform" && value != "normal") {
        return Fail("--jitter must be uniform or normal");
      }
      jitter_kind = value;
    } else if (flag == "--loss") {
      char* end = nullptr;
      loss = std::strtod(value.c_str(), &end);
      if (value.empty() || *end != '\0' || !(loss >= 0.0 && loss <= 1.0)) {
        return Fail("--loss must be a probability in [0, 1]");
      }
    } else if (flag == "--seed") {
      char* end = nullptr;
      config.profile.seed = std::strtoull(value.c_str(), &end, 10);
      if (value.empty() || *end != '\0') return Fail("bad --seed " + value);
    } else {
      return Fail("unknown flag " + std::string(flag));
    }
  }
  if (!have_target) return Fail("--target is required");

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

#include "tools/linkemu/proxy_config.h"

#include <charconv>

#include "server/net/address.h"

namespace tickmark::linkemu {

namespace errc = boost::system::errc;

std::optional<HostPort> ParseHostPort(std::string_view text) {
  std::string_view host;
  std::string_view port;
  if (!text.empty() && text.front() == '[') {
    const size_t close = text.find(']');
    if (close == std::string_view::npos || close + 1 >= text.size() ||
        text[close + 1] != ':') {
      return std::nullopt;
    }
    host = text.substr(1, close - 1);
    port = text.substr(close + 2);
  } else {
    const size_t colon = text.rfind(':');
    if (colon == std::string_view::npos) return std::nullopt;
    host = text.substr(0, colon);
    port = text.substr(colon + 1);
    // An unbracketed IPv6 address would be ambiguous ("::1:80").
    if (host.find(':') != std::string_view::npos) return std::nullopt;
  }
  if (host.empty() || port.empty()) return std::nullopt;
  uint16_t value = 0;
  auto [end, ec] = std::from_chars(port.data(), port.data() + port.size(), value);
  if (ec != std::errc() || end != port.data() + port.size()) return std::nullopt;
  return HostPort{std::string(host), value};
}

std::string ToString(const HostPort& hp) {
  const bool v6 = hp.host.find(':') != std::string::npos;
  return (v6 ? "[" + hp.host + "]" : hp.host) + ":" + std::to_string(hp.port);
}

boost::system::error_code ResolveAddress(const HostPort& hp,
                                         bool allow_non_loopback,
                                         boost::asio::ip::address* out) {
  boost::system::error_code ec;
  const auto address = boost::asio::ip::make_address(
      hp.host == "localhost" ? std::string("127.0.0.1") : hp.host, ec);
  if (ec) return errc::make_error_code(errc::invalid_argument);
  if (!net::IsLoopbackHost(hp.host) && !allow_non_loopback) {
    return errc::make_error_code(errc::permission_denied);
  }
  *out = address;
  return {};
}

boost::system::error_code ResolveProxyAddresses(const ProxyConfig& config,
                                                boost::asio::ip::address* listen,
                                                boost::asio::ip::address* target) {
  if (!config.profile.Valid()) {
    return boost::system::errc::make_error_code(boost::system::errc::invalid_argument);
  }
  if (auto ec = ResolveAddress(config.listen, config.allow_non_loopback, listen)) return ec;
  return ResolveAddress(config.target, config.allow_non_loopback, target);
}

}  // namespace tickmark::linkemu

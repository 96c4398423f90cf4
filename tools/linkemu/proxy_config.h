// Where a proxy listens, where it forwards to, and what the link does.
//
// Addresses are numeric (IPv4 or IPv6; "localhost" means 127.0.0.1): no name
// lookup, so tests stay hermetic. Loopback is decided by the one rule of
// server/net/address.h, as for tickmarkd and the clients.
// Unless allow_non_loopback is set, a proxy refuses to listen on or forward
// to anything but loopback — load and fault tests must not touch other hosts
// by accident.
//
// Plain values and pure functions; thread-compatible.
#ifndef TICKMARK_TOOLS_LINKEMU_PROXY_CONFIG_H_
#define TICKMARK_TOOLS_LINKEMU_PROXY_CONFIG_H_

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>

#include <boost/asio/ip/address.hpp>
#include <boost/system/error_code.hpp>

#include "tools/linkemu/link_profile.h"

namespace tickmark::linkemu {

struct HostPort {
  std::string host;   // numeric address, or "localhost"
  uint16_t port = 0;  // 0 when listening: the kernel picks a free port
};

// Parses "HOST:PORT" or "[V6ADDR]:PORT"; nullopt if malformed.
std::optional<HostPort> ParseHostPort(std::string_view text);

// "HOST:PORT", with brackets around an IPv6 address.
std::string ToString(const HostPort& hp);

// The address of `hp.host`. Errors: invalid_argument if not numeric,
// permission_denied if not loopback and !allow_non_loopback.
boost::system::error_code ResolveAddress(const HostPort& hp,
                                         bool allow_non_loopback,
                                         boost::asio::ip::address* out);

struct ProxyConfig {
  HostPort listen{"127.0.0.1", 0};  // where clients connect
  HostPort target;                  // the real server
  LinkProfile profile;              // what happens in between
  bool allow_non_loopback = false;  // see the file comment
};

// Checks the profile and resolves both ends of `config` (loopback only unless
// allowed): invalid_argument for a bad profile, else as ResolveAddress.
boost::system::error_code ResolveProxyAddresses(const ProxyConfig& config,
                                                boost::asio::ip::address* listen,
                                                boost::asio::ip::address* target);

}  // namespace tickmark::linkemu

#endif  // TICKMARK_TOOLS_LINKEMU_PROXY_CONFIG_H_

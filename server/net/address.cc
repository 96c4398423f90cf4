#include "server/net/address.h"

#include <algorithm>
#include <cctype>

#include <boost/asio/ip/address.hpp>

namespace tickmark::net {

std::string HostOf(std::string_view target) {
  if (!target.empty() && target.front() == '[') {
    const size_t close = target.find(']');
    return std::string(target.substr(1, close == std::string_view::npos ? std::string_view::npos
                                                                         : close - 1));
  }
  const size_t colon = target.rfind(':');
  // More than one colon without brackets: a bare IPv6 address, no port.
  if (colon != std::string_view::npos && target.find(':') == colon) {
    target = target.substr(0, colon);
  }
  return std::string(target);
}

bool IsLoopbackHost(std::string_view host) {
  std::string h(host);
  std::transform(h.begin(), h.end(), h.begin(),
                 [](unsigned char c) { return static_cast<char>(std::tolower(c)); });
  if (h == "localhost") return true;  // RFC 6761 §6.3
  boost::system::error_code ec;
  const auto address = boost::asio::ip::make_address(h, ec);
  if (ec) return false;
  if (address.is_v6() && address.to_v6().is_v4_mapped()) {
    return boost::asio::ip::make_address_v4(boost::asio::ip::v4_mapped, address.to_v6())
        .is_loopback();
  }
  return address.is_loopback();
}

bool IsLoopbackTarget(std::string_view host_port) { return IsLoopbackHost(HostOf(host_port)); }

}  // namespace tickmark::net

// UdpProbeServer: the optional UDP probe port (DEVELOPERS.md, "UDP probe
// port"). A Boost.Asio UDP socket served by one thread of its own; each
// datagram goes to a UdpProbeTable, and a challenge it returns is sent back
// to the datagram's sender at once.
//
// Streams are added and removed through table(); the gRPC side (rpc/) does
// so through LiveService::Options hooks wired by TickmarkServer, so rpc and
// net do not depend on each other.
//
// Ownership and threads: Start() binds and starts the thread; Stop() (or the
// destructor) closes the socket and joins it. table() is thread-safe.
#ifndef TICKMARK_SERVER_NET_UDP_PROBE_SERVER_H_
#define TICKMARK_SERVER_NET_UDP_PROBE_SERVER_H_

#include <array>
#include <boost/asio/io_context.hpp>
#include <boost/asio/ip/udp.hpp>
#include <cstdint>
#include <memory>
#include <string>
#include <thread>

#include "absl/status/statusor.h"
#include "server/net/probe_datagram.h"
#include "server/net/udp_probe_table.h"

namespace tickmark::net {

class UdpProbeServer {
 public:
  // Binds host:port (port 0 picks a free one). host may be a name, an IPv4
  // or an IPv6 address (without brackets). UNAVAILABLE if it cannot bind.
  static absl::StatusOr<std::unique_ptr<UdpProbeServer>> Start(const std::string& host,
                                                               uint16_t port);
  ~UdpProbeServer();
  UdpProbeServer(const UdpProbeServer&) = delete;
  UdpProbeServer& operator=(const UdpProbeServer&) = delete;

  uint16_t port() const { return port_; }
  UdpProbeTable& table() { return table_; }
  // Idempotent.
  void Stop();

 private:
  UdpProbeServer();
  void Receive();  // arms the next async receive

  UdpProbeTable table_;
  boost::asio::io_context io_;
  boost::asio::ip::udp::socket socket_;
  boost::asio::ip::udp::endpoint sender_;                  // of the datagram being received
  std::array<char, kMaxProbeDatagramBytes + 1> buffer_{};  // +1: oversize is seen as such
  uint16_t port_ = 0;
  std::thread thread_;  // runs io_
};

}  // namespace tickmark::net

#endif  // TICKMARK_SERVER_NET_UDP_PROBE_SERVER_H_

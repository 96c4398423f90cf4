#include "server/net/udp_probe_server.h"

#include <boost/asio/ip/address.hpp>
#include <boost/asio/post.hpp>

#include "server/base/log.h"
#include "server/base/strings.h"

namespace tickmark::net {

namespace asio = boost::asio;
using asio::ip::udp;

UdpProbeServer::UdpProbeServer() : socket_(io_) {}

absl::StatusOr<std::unique_ptr<UdpProbeServer>> UdpProbeServer::Start(const std::string& host,
                                                                      uint16_t port) {
  std::unique_ptr<UdpProbeServer> s(new UdpProbeServer());
  boost::system::error_code ec;
  udp::resolver resolver(s->io_);
  auto results = resolver.resolve(host, std::to_string(port), udp::resolver::passive, ec);
  if (ec || results.empty()) {
    return absl::UnavailableError(Cat("UDP probe port: cannot resolve ", host, ": ", ec.message()));
  }
  const udp::endpoint at = results.begin()->endpoint();
  s->socket_.open(at.protocol(), ec);
  if (!ec) s->socket_.bind(at, ec);
  if (ec) {
    return absl::UnavailableError(Cat("UDP probe port: cannot bind ", at.address().to_string(), ":",
                                      port, ": ", ec.message()));
  }
  s->port_ = s->socket_.local_endpoint().port();
  s->Receive();
  s->thread_ = std::thread([raw = s.get()] { raw->io_.run(); });
  return s;
}

UdpProbeServer::~UdpProbeServer() { Stop(); }

void UdpProbeServer::Stop() {
  if (!thread_.joinable()) return;
  asio::post(io_, [this] {
    boost::system::error_code ignored;
    socket_.close(ignored);
  });
  io_.stop();
  thread_.join();
}

void UdpProbeServer::Receive() {
  socket_.async_receive_from(
      asio::buffer(buffer_), sender_, [this](const boost::system::error_code& ec, size_t n) {
        if (ec == asio::error::operation_aborted) return;
        if (!ec) {
          const std::string reply = table_.Handle(std::string_view(buffer_.data(), n));
          if (!reply.empty()) {
            boost::system::error_code send_ec;
            socket_.send_to(asio::buffer(reply), sender_, 0, send_ec);
            if (send_ec) {
              TM_LOG(kDebug) << "UDP probe reply: " << send_ec.message();
            }
          }
        }
        // Errors such as ICMP port unreachable from an earlier send do not
        // close a UDP socket; keep receiving.
        if (socket_.is_open()) Receive();
      });
}

}  // namespace tickmark::net

#include "tools/linkemu/tcp_delay_proxy.h"

#include <algorithm>
#include <chrono>
#include <utility>

#include <boost/asio/error.hpp>

namespace tickmark::linkemu {
namespace {

namespace asio = boost::asio;
using asio::ip::tcp;
namespace errc = boost::system::errc;

}  // namespace

TcpDelayProxy::TcpDelayProxy(ProxyConfig config)
    : config_(std::move(config)),
      acceptor_(io_.context()),
      accept_retry_(io_.context()),
      forward_(config_.profile, Direction::kForward),
      backward_(config_.profile, Direction::kBackward) {}

TcpDelayProxy::~TcpDelayProxy() { Stop(); }

boost::system::error_code TcpDelayProxy::Start() {
  std::lock_guard<std::mutex> lock(mu_);
  if (started_ || stopped_) return asio::error::already_started;
  asio::ip::address listen_address;
  asio::ip::address target_address;
  if (auto ec = ResolveProxyAddresses(config_, &listen_address, &target_address)) return ec;
  target_ = tcp::endpoint(target_address, config_.target.port);

  const tcp::endpoint listen(listen_address, config_.listen.port);
  boost::system::error_code ec;
  acceptor_.open(listen.protocol(), ec);
  if (!ec) acceptor_.set_option(tcp::acceptor::reuse_address(true), ec);
  if (!ec) acceptor_.bind(listen, ec);
  if (!ec) acceptor_.listen(asio::socket_base::max_listen_connections, ec);
  if (ec) {
    boost::system::error_code ignored;
    acceptor_.close(ignored);
    return ec;
  }
  port_.store(acceptor_.local_endpoint(ec).port());
  Accept();
  io_.Start();
  started_ = true;
  return {};
}

void TcpDelayProxy::Stop() {
  std::lock_guard<std::mutex> lock(mu_);
  if (stopped_) return;
  stopped_ = true;
  io_.RunSync([this] {
    boost::system::error_code ignored;
    acceptor_.close(ignored);
    accept_retry_.cancel();
    CloseRelays();
  });
  io_.Stop();
}

void TcpDelayProxy::DropAll() {
  std::lock_guard<std::mutex> lock(mu_);
  if (!started_ || stopped_) return;
  io_.RunSync([this] { CloseRelays(); });
}

void TcpDelayProxy::CloseRelays() {
  for (const auto& weak : relays_) {
    if (auto relay = weak.lock()) relay->Close();
  }
  relays_.clear();
}

void TcpDelayProxy::Accept() {
  acceptor_.async_accept([this](const boost::system::error_code& ec,
                                tcp::socket socket) {
    if (ec == asio::error::operation_aborted || !acceptor_.is_open()) return;
    if (ec) {
      // Out of descriptors and the like: the listener itself is fine, so
      // try again shortly instead of spinning.
      accept_retry_.expires_after(std::chrono::milliseconds(10));
      accept_retry_.async_wait([this](const boost::system::error_code& wait_ec) {
        if (!wait_ec) Accept();
      });
      return;
    }
    if (blackhole_.load()) {
      boost::system::error_code ignored;
      socket.set_option(asio::socket_base::linger(true, 0), ignored);
      socket.close(ignored);
      counters_.Refused();
    } else {
      std::erase_if(relays_, [](const auto& w) { return w.expired(); });
      auto relay = std::make_shared<TcpRelay>(std::move(socket), &forward_,
                                              &backward_, &counters_);
      relays_.push_back(relay);
      relay->Start(target_);
    }
    Accept();
  });
}

}  // namespace tickmark::linkemu

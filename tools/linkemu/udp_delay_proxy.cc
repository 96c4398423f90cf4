#include "tools/linkemu/udp_delay_proxy.h"

#include <chrono>
#include <utility>

#include <boost/asio/buffer.hpp>
#include <boost/asio/error.hpp>
#include <boost/asio/steady_timer.hpp>

namespace tickmark::linkemu {
namespace {

namespace asio = boost::asio;
using asio::ip::udp;
namespace errc = boost::system::errc;

// Room for bursts: a few thousand small datagrams queue in the kernel while
// the I/O thread is busy, instead of being lost where the profile did not
// say so. The kernel caps this at net.core.rmem_max.
constexpr int kSocketBufferBytes = 4 * 1024 * 1024;

void EnlargeBuffers(udp::socket& s) {
  boost::system::error_code ignored;
  s.set_option(asio::socket_base::receive_buffer_size(kSocketBufferBytes), ignored);
  s.set_option(asio::socket_base::send_buffer_size(kSocketBufferBytes), ignored);
}

}  // namespace

UdpDelayProxy::UdpDelayProxy(ProxyConfig config)
    : config_(std::move(config)),
      listen_(io_.context()),
      forward_(config_.profile, Direction::kForward),
      backward_(config_.profile, Direction::kBackward) {}

UdpDelayProxy::~UdpDelayProxy() { Stop(); }

boost::system::error_code UdpDelayProxy::Start() {
  std::lock_guard<std::mutex> lock(mu_);
  if (started_ || stopped_) return asio::error::already_started;
  asio::ip::address listen_address;
  asio::ip::address target_address;
  if (auto ec = ResolveProxyAddresses(config_, &listen_address, &target_address)) return ec;
  target_ = udp::endpoint(target_address, config_.target.port);

  const udp::endpoint listen(listen_address, config_.listen.port);
  boost::system::error_code ec;
  listen_.open(listen.protocol(), ec);
  if (!ec) listen_.bind(listen, ec);
  if (ec) {
    boost::system::error_code ignored;
    listen_.close(ignored);
    return ec;
  }
  EnlargeBuffers(listen_);
  port_.store(listen_.local_endpoint(ec).port());
  ReceiveFromClients();
  io_.Start();
  started_ = true;
  return {};
}

void UdpDelayProxy::Stop() {
  std::lock_guard<std::mutex> lock(mu_);
  if (stopped_) return;
  stopped_ = true;
  io_.RunSync([this] {
    boost::system::error_code ignored;
    listen_.close(ignored);
    for (auto& [client, flow] : flows_) flow->upstream.close(ignored);
    flows_.clear();
  });
  io_.Stop();
}

void UdpDelayProxy::ReceiveFromClients() {
  listen_.async_receive_from(
      asio::buffer(buffer_), sender_,
      [this](const boost::system::error_code& ec, size_t n) {
        if (!listen_.is_open()) return;
        // An error here (e.g. an ICMP port-unreachable reported on a later
        // receive) concerns one datagram, not the socket.
        if (!ec) {
          counters_.Received(Direction::kForward, n);
          if (auto flow = FlowFor(sender_)) {
            Forward(Direction::kForward, std::move(flow),
                    std::vector<char>(buffer_.begin(),
                                      buffer_.begin() + static_cast<ptrdiff_t>(n)));
          } else {
            counters_.Dropped(Direction::kForward);
          }
        }
        ReceiveFromClients();
      });
}

void UdpDelayProxy::ReceiveFromTarget(std::shared_ptr<Flow> flow) {
  Flow& f = *flow;
  f.upstream.async_receive(
      asio::buffer(f.buffer),
      [this, flow = std::move(flow)](const boost::system::error_code& ec,
                                     size_t n) mutable {
        if (!flow->upstream.is_open()) return;
        // connection_refused: the target is not (yet) listening; the
        // datagram is gone but the flow stays usable.
        if (!ec) {
          counters_.Received(Direction::kBackward, n);
          Forward(Direction::kBackward, flow,
                  std::vector<char>(flow->buffer.begin(),
                                    flow->buffer.begin() + static_cast<ptrdiff_t>(n)));
        }
        ReceiveFromTarget(std::move(flow));
      });
}

std::shared_ptr<UdpDelayProxy::Flow> UdpDelayProxy::FlowFor(
    const udp::endpoint& client) {
  if (auto it = flows_.find(client); it != flows_.end()) return it->second;
  if (flows_.size() >= kMaxFlows) return nullptr;
  auto flow = std::make_shared<Flow>(io_.context());
  flow->client = client;
  boost::system::error_code ec;
  flow->upstream.connect(target_, ec);
  if (ec) return nullptr;
  EnlargeBuffers(flow->upstream);
  flows_.emplace(client, flow);
  counters_.Connection();
  ReceiveFromTarget(flow);
  return flow;
}

void UdpDelayProxy::Forward(Direction direction, std::shared_ptr<Flow> flow,
                            std::vector<char> bytes) {
  DelaySampler& sampler = direction == Direction::kForward ? forward_ : backward_;
  // Both draws are taken for every datagram, so the sequence of fates does
  // not depend on the blackhole or on earlier losses.
  const bool lost = sampler.NextLost();
  const Duration delay = sampler.NextDelay();
  if (lost || blackhole_.load()) {
    counters_.Dropped(direction);
    return;
  }
  auto timer = std::make_shared<asio::steady_timer>(
      io_.context(), std::chrono::nanoseconds(delay.nanos()));
  auto payload = std::make_shared<std::vector<char>>(std::move(bytes));
  timer->async_wait([this, direction, flow = std::move(flow), timer,
                     payload](const boost::system::error_code& ec) {
    if (ec || !listen_.is_open()) return;
    auto sent = [this, direction, payload](const boost::system::error_code& send_ec,
                                           size_t n) {
      if (send_ec) {
        counters_.Dropped(direction);
      } else {
        counters_.Delivered(direction, n);
      }
    };
    if (direction == Direction::kForward) {
      flow->upstream.async_send(asio::buffer(*payload), std::move(sent));
    } else {
      listen_.async_send_to(asio::buffer(*payload), flow->client, std::move(sent));
    }
  });
}

}  // namespace tickmark::linkemu

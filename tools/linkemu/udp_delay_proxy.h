// A UDP proxy that loses and delays datagrams according to a LinkProfile.
//
// Every client address seen on the listening socket gets its own flow: a
// socket connected to the target, so the target's replies can be told apart
// and sent back to the right client. Each datagram draws its own loss and
// delay, so datagrams may overtake each other when the jitter exceeds their
// spacing — as on a real path. Flows are never expired (tests and
// benchmarks use a few clients); past kMaxFlows new clients are dropped.
//
// Ownership: the proxy owns its I/O thread, sockets and flows.
// Thread safety: every public method is thread-safe. The destructor stops.
#ifndef TICKMARK_TOOLS_LINKEMU_UDP_DELAY_PROXY_H_
#define TICKMARK_TOOLS_LINKEMU_UDP_DELAY_PROXY_H_

#include <array>
#include <atomic>
#include <cstddef>
#include <cstdint>
#include <map>
#include <memory>
#include <mutex>
#include <vector>

#include <boost/asio/ip/udp.hpp>
#include <boost/system/error_code.hpp>

#include "tools/linkemu/delay_sampler.h"
#include "tools/linkemu/io_thread.h"
#include "tools/linkemu/link_counters.h"
#include "tools/linkemu/proxy_config.h"

namespace tickmark::linkemu {

class UdpDelayProxy {
 public:
  // Distinct client addresses served at once.
  static constexpr size_t kMaxFlows = 4096;

  explicit UdpDelayProxy(ProxyConfig config);
  UdpDelayProxy(const UdpDelayProxy&) = delete;
  UdpDelayProxy& operator=(const UdpDelayProxy&) = delete;
  ~UdpDelayProxy();

  // Binds the listening socket and starts relaying on the proxy's thread.
  // Errors as TcpDelayProxy::Start.
  [[nodiscard]] boost::system::error_code Start();

  // Closes every socket; datagrams still in flight are discarded.
  // Idempotent; a stopped proxy cannot be started again.
  void Stop();

  // The listening port once started, else 0.
  uint16_t port() const { return port_.load(); }

  // While on, every datagram in either direction is dropped (and counted).
  void SetBlackhole(bool on) { blackhole_.store(on); }

  LinkCounters counters() const { return counters_.Snapshot(); }

 private:
  // One client address and its socket towards the target.
  struct Flow {
    explicit Flow(boost::asio::io_context& io) : upstream(io) {}
    boost::asio::ip::udp::endpoint client;             // where replies go
    boost::asio::ip::udp::socket upstream;             // connected to the target
    std::array<char, 64 * 1024> buffer;                // target of the pending receive
  };

  void ReceiveFromClients();
  void ReceiveFromTarget(std::shared_ptr<Flow> flow);
  std::shared_ptr<Flow> FlowFor(const boost::asio::ip::udp::endpoint& client);
  // Loses or delays `bytes`, then sends them on `flow` in `direction`.
  void Forward(Direction direction, std::shared_ptr<Flow> flow,
               std::vector<char> bytes);

  const ProxyConfig config_;            // as given
  std::mutex mu_;                       // serialises Start and Stop
  bool started_ = false;                // Start succeeded once (guarded by mu_)
  bool stopped_ = false;                // Stop ran (guarded by mu_)
  std::atomic<uint16_t> port_{0};       // listening port, 0 before Start
  std::atomic<bool> blackhole_{false};  // drop everything
  CounterSet counters_;                 // live counters

  // Below: touched only on the I/O thread (or under mu_ when it is not running).
  // io_ is declared before the sockets so it outlives them.
  IoThread io_;                                    // runs everything below
  boost::asio::ip::udp::socket listen_;            // faces the clients
  boost::asio::ip::udp::endpoint target_;          // resolved in Start
  boost::asio::ip::udp::endpoint sender_;          // source of the pending receive
  std::array<char, 64 * 1024> buffer_;             // target of the pending receive
  DelaySampler forward_;                           // client→server fate
  DelaySampler backward_;                          // server→client fate
  std::map<boost::asio::ip::udp::endpoint, std::shared_ptr<Flow>> flows_;  // by client
};

}  // namespace tickmark::linkemu

#endif  // TICKMARK_TOOLS_LINKEMU_UDP_DELAY_PROXY_H_

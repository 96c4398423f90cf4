// A TCP proxy that delays each direction of every relayed connection
// according to a LinkProfile. It is a byte pipe, so any protocol over TCP
// (gRPC over HTTP/2 included) goes through unchanged, only later.
//
// Loss does not apply: TCP cannot lose bytes, and emulating loss as extra
// delay would need a model of retransmission we do not have. Use the UDP
// proxy for loss, and DropAll()/SetBlackhole() for faults.
//
// Ownership: the proxy owns its I/O thread, acceptor and relays.
// Thread safety: every public method is thread-safe. The destructor stops.
#ifndef TICKMARK_TOOLS_LINKEMU_TCP_DELAY_PROXY_H_
#define TICKMARK_TOOLS_LINKEMU_TCP_DELAY_PROXY_H_

#include <atomic>
#include <cstdint>
#include <memory>
#include <mutex>
#include <vector>

#include <boost/asio/ip/tcp.hpp>
#include <boost/asio/steady_timer.hpp>
#include <boost/system/error_code.hpp>

#include "tools/linkemu/delay_sampler.h"
#include "tools/linkemu/io_thread.h"
#include "tools/linkemu/link_counters.h"
#include "tools/linkemu/proxy_config.h"
#include "tools/linkemu/tcp_relay.h"

namespace tickmark::linkemu {

class TcpDelayProxy {
 public:
  explicit TcpDelayProxy(ProxyConfig config);
  TcpDelayProxy(const TcpDelayProxy&) = delete;
  TcpDelayProxy& operator=(const TcpDelayProxy&) = delete;
  ~TcpDelayProxy();

  // Binds the listening socket and starts relaying on the proxy's thread.
  // Errors: invalid_argument (bad profile or address), permission_denied
  // (non-loopback address not allowed), already_started (a second call),
  // or the bind/listen error.
  [[nodiscard]] boost::system::error_code Start();

  // Closes the listener and resets every relayed connection. Idempotent;
  // a stopped proxy cannot be started again.
  void Stop();

  // The listening port once started, else 0.
  uint16_t port() const { return port_.load(); }

  // Resets every relayed connection now (both sides see a reset); returns
  // once done. New connections are still accepted.
  void DropAll();

  // While on, every new connection is accepted and reset at once: clients
  // see their connection fail, as if the server were gone. Existing
  // connections are untouched (combine with DropAll for a full outage).
  void SetBlackhole(bool on) { blackhole_.store(on); }

  LinkCounters counters() const { return counters_.Snapshot(); }

 private:
  void Accept();
  void CloseRelays();

  const ProxyConfig config_;       // as given
  std::mutex mu_;                  // serialises Start, Stop and DropAll
  bool started_ = false;           // Start succeeded once (guarded by mu_)
  bool stopped_ = false;           // Stop ran (guarded by mu_)
  std::atomic<uint16_t> port_{0};  // listening port, 0 before Start
  std::atomic<bool> blackhole_{false};  // reset new connections
  CounterSet counters_;            // live counters

  // Below: touched only on the I/O thread (or under mu_ when it is not running).
  // io_ is declared before the sockets so it outlives them.
  IoThread io_;                                   // runs everything below
  boost::asio::ip::tcp::acceptor acceptor_;       // listens for clients
  boost::asio::steady_timer accept_retry_;        // backs off after an accept error
  boost::asio::ip::tcp::endpoint target_;         // resolved in Start
  DelaySampler forward_;                          // client→server delays
  DelaySampler backward_;                         // server→client delays
  std::vector<std::weak_ptr<TcpRelay>> relays_;   // live relays, for DropAll
};

}  // namespace tickmark::linkemu

#endif  // TICKMARK_TOOLS_LINKEMU_TCP_DELAY_PROXY_H_

// UdpProber: the client's half of the UDP probe exchange
// (server/net/probe_datagram.h). It sends a request, and on the server's
// challenge stamps T2, answers with T1, T2 and T3 (T3 right before the send),
// then waits for the next probe: a burst of kBurst probes kBurstSpacing apart
// right after the start, so the server's model sharpens soon after the
// Welcome, then one per `interval`.
//
// A lost or blocked datagram costs nothing but its sample, since the stream's
// own probes go on regardless; so failing to resolve the host or to make a
// socket is not an error either (Start returns nullptr).
//
// Ownership and threads: Start() opens a connected UDP socket (only the
// server's datagrams arrive) and starts one thread; the destructor wakes it
// (an eventfd), joins it and closes both descriptors. on_exchange runs on
// that thread after every completed exchange. Not copyable or movable.
#ifndef TICKMARK_CLIENTS_COMMON_UDP_PROBER_H_
#define TICKMARK_CLIENTS_COMMON_UDP_PROBER_H_

#include <cstdint>
#include <functional>
#include <memory>
#include <string>
#include <thread>

#include "server/core/time.h"

namespace tickmark::client {

class UdpProber {
 public:
  // The first probes come this fast.
  static constexpr int kBurst = 8;
  static constexpr Duration kBurstSpacing = Duration::Millis(50);
  // A challenge later than this is given up; the next request has a new id.
  static constexpr Duration kReplyTimeout = Duration::Millis(500);

  // `clock` (not owned, must outlive the prober) stamps T2 and T3: it is the
  // client clock event times use. nullptr when the host does not resolve or
  // no socket can be made.
  static std::unique_ptr<UdpProber> Start(const std::string& host, uint32_t port, uint64_t tag,
                                          std::string key, const MonotonicSource* clock,
                                          Duration interval, std::function<void()> on_exchange);

  ~UdpProber();
  UdpProber(const UdpProber&) = delete;
  UdpProber& operator=(const UdpProber&) = delete;

 private:
  UdpProber(int fd, int wake, uint64_t tag, std::string key, const MonotonicSource* clock,
            Duration interval, std::function<void()> on_exchange);

  // Waits until the socket is readable (true) or the timeout passes or a
  // stop is asked for (false; stopping_ tells which).
  bool WaitReadable(Duration timeout);
  void Run();

  const int fd_;     // connected UDP socket
  const int wake_;   // eventfd: written to stop
  const uint64_t tag_;
  const std::string key_;
  const MonotonicSource* const clock_;  // the client clock; T2 and T3
  const Duration interval_;
  const std::function<void()> on_exchange_;
  bool stopping_ = false;  // only the thread touches it
  std::thread thread_;
};

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_UDP_PROBER_H_

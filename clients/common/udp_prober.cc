#include "clients/common/udp_prober.h"

#include <netdb.h>
#include <poll.h>
#include <sys/eventfd.h>
#include <sys/socket.h>
#include <unistd.h>

#include <algorithm>
#include <array>
#include <chrono>
#include <string_view>
#include <utility>

#include "server/net/probe_datagram.h"

namespace tickmark::client {
namespace {

// Schedules run on the process's steady clock: the client clock may be a
// test's hand-driven one and only stamps T2 and T3.
int64_t SteadyNanos() {
  return std::chrono::duration_cast<std::chrono::nanoseconds>(
             std::chrono::steady_clock::now().time_since_epoch())
      .count();
}

}  // namespace

std::unique_ptr<UdpProber> UdpProber::Start(const std::string& host, uint32_t port, uint64_t tag,
                                            std::string key, const MonotonicSource* clock,
                                            Duration interval,
                                            std::function<void()> on_exchange) {
  addrinfo hints{};
  hints.ai_socktype = SOCK_DGRAM;
  addrinfo* found = nullptr;
  if (getaddrinfo(host.c_str(), std::to_string(port).c_str(), &hints, &found) != 0) {
    return nullptr;
  }
  int fd = -1;
  for (addrinfo* a = found; a != nullptr && fd < 0; a = a->ai_next) {
    fd = socket(a->ai_family, a->ai_socktype | SOCK_CLOEXEC, a->ai_protocol);
    if (fd >= 0 && connect(fd, a->ai_addr, a->ai_addrlen) != 0) {
      close(fd);
      fd = -1;
    }
  }
  freeaddrinfo(found);
  if (fd < 0) return nullptr;
  const int wake = eventfd(0, EFD_CLOEXEC);
  if (wake < 0) {
    close(fd);
    return nullptr;
  }
  std::unique_ptr<UdpProber> p(
      new UdpProber(fd, wake, tag, std::move(key), clock, interval, std::move(on_exchange)));
  p->thread_ = std::thread([raw = p.get()] { raw->Run(); });
  return p;
}

UdpProber::UdpProber(int fd, int wake, uint64_t tag, std::string key,
                     const MonotonicSource* clock, Duration interval,
                     std::function<void()> on_exchange)
    : fd_(fd),
      wake_(wake),
      tag_(tag),
      key_(std::move(key)),
      clock_(clock),
      interval_(interval),
      on_exchange_(std::move(on_exchange)) {}

UdpProber::~UdpProber() {
  const uint64_t one = 1;
  (void)!write(wake_, &one, sizeof one);
  thread_.join();
  close(fd_);
  close(wake_);
}

bool UdpProber::WaitReadable(Duration timeout) {
  std::array<pollfd, 2> fds{pollfd{fd_, POLLIN, 0}, pollfd{wake_, POLLIN, 0}};
  const int ms = static_cast<int>(std::max<int64_t>(0, timeout.nanos() / 1'000'000));
  if (poll(fds.data(), fds.size(), ms) <= 0) return false;
  if (fds[1].revents != 0) {
    stopping_ = true;
    return false;
  }
  return (fds[0].revents & POLLIN) != 0;
}

void UdpProber::Run() {
  using net::ProbeDatagram;
  using net::ProbeDatagramKind;
  uint64_t id = 0;
  int sent = 0;
  std::array<char, net::kMaxProbeDatagramBytes + 1> buf{};
  while (!stopping_) {
    ProbeDatagram request{ProbeDatagramKind::kRequest, tag_, ++id};
    const std::string out = net::EncodeProbeDatagram(request, key_);
    if (send(fd_, out.data(), out.size(), 0) >= 0) {
      const int64_t give_up = SteadyNanos() + kReplyTimeout.nanos();
      while (!stopping_) {
        const int64_t left = give_up - SteadyNanos();
        if (left <= 0 || !WaitReadable(Duration::Nanos(left))) break;
        const ssize_t n = recv(fd_, buf.data(), buf.size(), 0);
        const int64_t t2 = clock_->NowNanos();  // as close to the read as we can
        if (n <= 0) continue;  // e.g. ICMP port unreachable from an earlier send
        ProbeDatagram c;
        if (net::DecodeProbeDatagram(std::string_view(buf.data(), static_cast<size_t>(n)), key_,
                                     &c) != net::ProbeDecodeResult::kOk ||
            c.kind != ProbeDatagramKind::kChallenge || c.tag != tag_ || c.id != id) {
          continue;  // stale or foreign; keep waiting for ours
        }
        ProbeDatagram answer{ProbeDatagramKind::kAnswer, tag_, id, c.t1_session_ns, t2, 0};
        answer.t3_client_ns = clock_->NowNanos();
        const std::string a = net::EncodeProbeDatagram(answer, key_);
        if (send(fd_, a.data(), a.size(), 0) >= 0) on_exchange_();
        break;
      }
    }
    ++sent;
    const Duration gap = sent < kBurst ? kBurstSpacing : interval_;
    // Sleeps until the next probe unless asked to stop; datagrams that
    // arrive meanwhile are late challenges, read and dropped.
    const int64_t next = SteadyNanos() + gap.nanos();
    while (!stopping_) {
      const int64_t left = next - SteadyNanos();
      if (left <= 0) break;
      if (WaitReadable(Duration::Nanos(left))) (void)recv(fd_, buf.data(), buf.size(), 0);
    }
  }
}

}  // namespace tickmark::client

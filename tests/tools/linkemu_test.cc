// Tests of the link emulator: samplers and addresses fed directly, the
// proxies end to end on 127.0.0.1:0 against small echo servers, and the
// simulated client clock on a FakeMonotonic.
//
// No test asserts an upper bound on time. Delays are checked only as causal
// lower bounds (a byte cannot arrive before it was sent plus the configured
// minimum delay); everything else is ordering, byte-exactness and counts.
#include <algorithm>
#include <array>
#include <atomic>
#include <chrono>
#include <cstdint>
#include <functional>
#include <memory>
#include <mutex>
#include <optional>
#include <random>
#include <string>
#include <thread>
#include <vector>

#include <boost/asio/buffer.hpp>
#include <boost/asio/io_context.hpp>
#include <boost/asio/ip/tcp.hpp>
#include <boost/asio/ip/udp.hpp>
#include <boost/asio/read.hpp>
#include <boost/asio/write.hpp>
#include <gtest/gtest.h>

#include "server/core/time.h"
#include "tools/linkemu/delay_sampler.h"
#include "tools/linkemu/link_profile.h"
#include "tools/linkemu/proxy_config.h"
#include "tools/linkemu/simulated_clock.h"
#include "tools/linkemu/tcp_delay_proxy.h"
#include "tools/linkemu/udp_delay_proxy.h"

namespace tickmark::linkemu {
namespace {

namespace asio = boost::asio;
using asio::ip::tcp;
using asio::ip::udp;
using SteadyClock = std::chrono::steady_clock;

// How long a test waits for something that should happen promptly. Generous:
// the machine is shared, and a pass never waits this long.
constexpr std::chrono::seconds kDeadline(30);

std::chrono::nanoseconds ToChrono(Duration d) {
  return std::chrono::nanoseconds(d.nanos());
}

// Polls `pred` until it holds or kDeadline passes.
bool WaitUntil(const std::function<bool()>& pred) {
  const auto end = SteadyClock::now() + kDeadline;
  while (!pred()) {
    if (SteadyClock::now() > end) return false;
    std::this_thread::sleep_for(std::chrono::milliseconds(1));
  }
  return true;
}

ProxyConfig ConfigTo(uint16_t target_port, LinkProfile profile) {
  ProxyConfig config;
  config.target = HostPort{"127.0.0.1", target_port};
  config.profile = profile;
  return config;
}

// A TCP echo server on its own thread. Records when each read completed and
// counts connections that ended (EOF or error).
class TcpEchoServer {
 public:
  TcpEchoServer() : acceptor_(io_, tcp::endpoint(asio::ip::address_v4::loopback(), 0)) {
    Accept();
    thread_ = std::thread([this] { io_.run(); });
  }
  ~TcpEchoServer() {
    io_.stop();
    thread_.join();
  }

  uint16_t port() const { return acceptor_.local_endpoint().port(); }
  int ended() const { return ended_.load(); }
  std::vector<SteadyClock::time_point> read_times() {
    std::lock_guard<std::mutex> lock(mu_);
    return read_times_;
  }

 private:
  struct Connection {
    explicit Connection(tcp::socket s) : socket(std::move(s)) {}
    tcp::socket socket;               // to the proxy
    std::array<char, 4096> buffer{};  // pending read
  };

  void Accept() {
    acceptor_.async_accept([this](boost::system::error_code ec, tcp::socket s) {
      if (ec) return;
      Read(std::make_shared<Connection>(std::move(s)));
      Accept();
    });
  }

  void Read(std::shared_ptr<Connection> c) {
    c->socket.async_read_some(
        asio::buffer(c->buffer), [this, c](boost::system::error_code ec, size_t n) {
          if (ec) {
            boost::system::error_code ignored;
            c->socket.shutdown(tcp::socket::shutdown_send, ignored);
            ++ended_;
            return;
          }
          {
            std::lock_guard<std::mutex> lock(mu_);
            read_times_.push_back(SteadyClock::now());
          }
          asio::async_write(c->socket, asio::buffer(c->buffer, n),
                            [this, c](boost::system::error_code write_ec, size_t) {
                              if (write_ec) {
                                ++ended_;
                                return;
                              }
                              Read(c);
                            });
        });
  }

  asio::io_context io_;                             // runs the server
  tcp::acceptor acceptor_;                          // 127.0.0.1:0
  std::thread thread_;                              // runs io_
  std::atomic<int> ended_{0};                       // connections that ended
  std::mutex mu_;                                   // guards read_times_
  std::vector<SteadyClock::time_point> read_times_; // completion of each read
};

// A UDP echo server on its own thread.
class UdpEchoServer {
 public:
  UdpEchoServer() : socket_(io_, udp::endpoint(asio::ip::address_v4::loopback(), 0)) {
    boost::system::error_code ignored;
    socket_.set_option(asio::socket_base::receive_buffer_size(1 << 20), ignored);
    Receive();
    thread_ = std::thread([this] { io_.run(); });
  }
  ~UdpEchoServer() {
    io_.stop();
    thread_.join();
  }
  uint16_t port() const { return socket_.local_endpoint().port(); }

 private:
  void Receive() {
    socket_.async_receive_from(asio::buffer(buffer_), sender_,
                               [this](boost::system::error_code ec, size_t n) {
                                 if (!ec) {
                                   boost::system::error_code ignored;
                                   socket_.send_to(asio::buffer(buffer_, n), sender_,
                                                   0, ignored);
                                 }
                                 Receive();
                               });
  }

  asio::io_context io_;                // runs the server
  udp::socket socket_;                 // 127.0.0.1:0
  udp::endpoint sender_;               // source of the pending receive
  std::array<char, 65536> buffer_{};   // pending receive
  std::thread thread_;                 // runs io_
};

// A client socket whose reads give up at kDeadline instead of hanging.
template <typename Socket>
class DeadlineClient {
 public:
  DeadlineClient() : socket_(io_) {}
  Socket& socket() { return socket_; }

  // Runs the operation `start` begins (it must call the handler it is
  // given) until it completes; false if kDeadline passed first. Other
  // operations pending on this client progress meanwhile.
  bool Run(const std::function<void(std::function<void()>)>& start) {
    bool done = false;
    start([this, &done] {
      done = true;
      io_.stop();  // return now, even if other operations are still pending
    });
    io_.restart();
    io_.run_for(kDeadline);
    if (!done) {
      boost::system::error_code ignored;
      socket_.cancel(ignored);
      io_.restart();
      io_.run();
      return false;
    }
    return true;
  }

 protected:
  asio::io_context io_;  // runs this client's operations on the test thread
  Socket socket_;        // the client's socket
};

class TcpClient : public DeadlineClient<tcp::socket> {
 public:
  void Connect(uint16_t port) {
    socket_.connect(tcp::endpoint(asio::ip::address_v4::loopback(), port));
    socket_.set_option(tcp::no_delay(true));
  }
  void Write(const std::string& data) { asio::write(socket_, asio::buffer(data)); }

  // Starts writing `data` in many small pieces of random size, then shuts
  // down the sending side. Progresses while a read runs (same thread, so the
  // socket is never used from two threads at once).
  void StartWritingThenShutdown(std::string data, uint32_t seed) {
    struct State {
      std::string data;    // what to send
      size_t at = 0;       // bytes written so far
      std::mt19937 rng;    // piece sizes
    };
    auto state = std::make_shared<State>(State{std::move(data), 0, std::mt19937(seed)});
    auto next = std::make_shared<std::function<void()>>();
    *next = [this, state, next] {
      if (state->at == state->data.size()) {
        boost::system::error_code ignored;
        socket_.shutdown(tcp::socket::shutdown_send, ignored);
        *next = nullptr;  // break the self-reference
        return;
      }
      const size_t n = std::min<size_t>(state->data.size() - state->at,
                                        1 + state->rng() % 700);
      asio::async_write(socket_, asio::buffer(state->data.data() + state->at, n),
                        [state, next](boost::system::error_code ec, size_t written) {
                          if (ec) {
                            *next = nullptr;
                            return;
                          }
                          state->at += written;
                          (*next)();
                        });
    };
    (*next)();
  }

  // Exactly `n` bytes, or nullopt on error, EOF or deadline.
  std::optional<std::string> Read(size_t n) {
    std::string data(n, '\0');
    boost::system::error_code ec;
    const bool done = Run([&](std::function<void()> finish) {
      asio::async_read(socket_, asio::buffer(data),
                       [&, finish](boost::system::error_code e, size_t) {
                         ec = e;
                         finish();
                       });
    });
    if (!done || ec) return std::nullopt;
    return data;
  }

  // Everything until the peer closes; `ec` is eof for an orderly close.
  std::string ReadToEnd(boost::system::error_code* ec) {
    std::string data;
    std::array<char, 4096> chunk;
    while (true) {
      size_t got = 0;
      const bool done = Run([&](std::function<void()> finish) {
        socket_.async_read_some(asio::buffer(chunk),
                                [&, finish](boost::system::error_code e, size_t n) {
                                  *ec = e;
                                  got = n;
                                  finish();
                                });
      });
      if (!done) {
        *ec = asio::error::timed_out;
        return data;
      }
      data.append(chunk.data(), got);
      if (*ec) return data;
    }
  }
};

class UdpClient : public DeadlineClient<udp::socket> {
 public:
  explicit UdpClient(uint16_t proxy_port)
      : proxy_(asio::ip::address_v4::loopback(), proxy_port) {
    socket_.open(udp::v4());
    socket_.bind(udp::endpoint(asio::ip::address_v4::loopback(), 0));
    boost::system::error_code ignored;
    socket_.set_option(asio::socket_base::receive_buffer_size(1 << 20), ignored);
  }
  void Send(const std::string& data) { socket_.send_to(asio::buffer(data), proxy_); }

  // One datagram, or nullopt on error or deadline.
  std::optional<std::string> Receive() {
    std::array<char, 65536> buffer;
    size_t got = 0;
    boost::system::error_code ec;
    udp::endpoint from;
    const bool done = Run([&](std::function<void()> finish) {
      socket_.async_receive_from(asio::buffer(buffer), from,
                                 [&, finish](boost::system::error_code e, size_t n) {
                                   ec = e;
                                   got = n;
                                   finish();
                                 });
    });
    if (!done || ec) return std::nullopt;
    return std::string(buffer.data(), got);
  }

 private:
  udp::endpoint proxy_;  // where datagrams go
};

// Deterministic test bytes: a counter pattern with no short period, so a
// reordered or duplicated chunk cannot go unnoticed.
std::string Pattern(size_t n, uint32_t seed) {
  std::mt19937 rng(seed);
  std::string s(n, '\0');
  for (char& c : s) c = static_cast<char>(rng() & 0xff);
  return s;
}

// ---------------------------------------------------------------- sampler

TEST(DelaySamplerTest, NoJitterGivesTheDelayExactly) {
  DelaySampler s(LinkProfile::Symmetric(Duration::Millis(20)), Direction::kForward);
  for (int i = 0; i < 100; ++i) EXPECT_EQ(s.NextDelay(), Duration::Millis(20));
}

TEST(DelaySamplerTest, UniformJitterStaysInItsBand) {
  LinkProfile p = LinkProfile::Symmetric(Duration::Millis(20),
                                         Jitter::Uniform(Duration::Millis(5)));
  DelaySampler s(p, Direction::kBackward);
  Duration lo = Duration::Max();
  Duration hi = Duration::Zero();
  for (int i = 0; i < 10000; ++i) {
    const Duration d = s.NextDelay();
    lo = std::min(lo, d);
    hi = std::max(hi, d);
  }
  EXPECT_GE(lo, Duration::Millis(15));  // delay − half-width, by definition
  EXPECT_LE(hi, Duration::Millis(25));  // delay + half-width, by definition
  // 10000 draws from U[15, 25] ms come within 0.1 ms of both ends with
  // probability 1 − 2·0.99^10000 (common practice, no source).
  EXPECT_LT(lo, Duration::Micros(15100));
  EXPECT_GT(hi, Duration::Micros(24900));
}

TEST(DelaySamplerTest, NormalJitterIsTruncatedAtZero) {
  // σ larger than the delay: about 31% of raw draws would be negative
  // (Φ(−0.5), standard normal table).
  LinkProfile p = LinkProfile::Symmetric(Duration::Millis(5),
                                         Jitter::Normal(Duration::Millis(10)));
  DelaySampler s(p, Direction::kForward);
  int at_zero = 0;
  for (int i = 0; i < 10000; ++i) {
    const Duration d = s.NextDelay();
    ASSERT_GE(d, Duration::Zero());
    if (d == Duration::Zero()) ++at_zero;
  }
  // Redrawing, not clamping: no mass piles up at exactly zero.
  EXPECT_LT(at_zero, 10);
}

TEST(DelaySamplerTest, SameSeedRepeatsDirectionsDiffer) {
  LinkProfile p = LinkProfile::Symmetric(Duration::Millis(10),
                                         Jitter::Normal(Duration::Millis(3)), 0.2, 42);
  DelaySampler a(p, Direction::kForward);
  DelaySampler b(p, Direction::kForward);
  DelaySampler c(p, Direction::kBackward);
  bool differs = false;
  for (int i = 0; i < 100; ++i) {
    const Duration da = a.NextDelay();
    EXPECT_EQ(da, b.NextDelay());
    EXPECT_EQ(a.NextLost(), b.NextLost());
    if (da != c.NextDelay()) differs = true;
  }
  EXPECT_TRUE(differs);
}

TEST(DelaySamplerTest, LossFrequencyMatchesProbability) {
  LinkProfile p = LinkProfile::Symmetric(Duration::Zero(), Jitter::None(), 0.1, 7);
  DelaySampler s(p, Direction::kForward);
  int lost = 0;
  for (int i = 0; i < 100000; ++i) lost += s.NextLost() ? 1 : 0;
  // Binomial(100000, 0.1): σ ≈ 95; ±1000 is over 10σ (common practice, no source).
  EXPECT_GT(lost, 9000);
  EXPECT_LT(lost, 11000);
}

TEST(LinkProfileTest, ValidRejectsOutOfRangeFields) {
  EXPECT_TRUE(LinkProfile::Symmetric(Duration::Millis(1)).Valid());
  EXPECT_FALSE(LinkProfile::Symmetric(-Duration::Millis(1)).Valid());
  EXPECT_FALSE(LinkProfile::Symmetric(Duration::Zero(), Jitter::None(), 1.5).Valid());
  EXPECT_FALSE(LinkProfile::Symmetric(Duration::Zero(), Jitter::None(), -0.1).Valid());
  EXPECT_FALSE(LinkProfile::Symmetric(Duration::Zero(),
                                      Jitter::Uniform(-Duration::Millis(1)))
                   .Valid());
}

// ---------------------------------------------------------------- addresses

TEST(ProxyConfigTest, ParsesHostPort) {
  auto v4 = ParseHostPort("127.0.0.1:8080");
  ASSERT_TRUE(v4);
  EXPECT_EQ(v4->host, "127.0.0.1");
  EXPECT_EQ(v4->port, 8080);
  auto v6 = ParseHostPort("[::1]:0");
  ASSERT_TRUE(v6);
  EXPECT_EQ(v6->host, "::1");
  EXPECT_EQ(v6->port, 0);
  EXPECT_EQ(ToString(*v6), "[::1]:0");
  EXPECT_FALSE(ParseHostPort("127.0.0.1"));
  EXPECT_FALSE(ParseHostPort("::1:80"));
  EXPECT_FALSE(ParseHostPort("127.0.0.1:65536"));
  EXPECT_FALSE(ParseHostPort("127.0.0.1:8x"));
  EXPECT_FALSE(ParseHostPort(":80"));
}

TEST(ProxyConfigTest, RefusesNonLoopbackUnlessAllowed) {
  asio::ip::address a;
  EXPECT_FALSE(ResolveAddress({"127.0.0.1", 1}, false, &a));
  EXPECT_FALSE(ResolveAddress({"::1", 1}, false, &a));
  EXPECT_FALSE(ResolveAddress({"localhost", 1}, false, &a));
  // 192.0.2.0/24 is TEST-NET-1, documentation only (RFC 5737 §3).
  EXPECT_EQ(ResolveAddress({"192.0.2.1", 1}, false, &a),
            boost::system::errc::permission_denied);
  EXPECT_FALSE(ResolveAddress({"192.0.2.1", 1}, true, &a));
  EXPECT_EQ(ResolveAddress({"example.org", 1}, true, &a),
            boost::system::errc::invalid_argument);

  ProxyConfig config = ConfigTo(9, LinkProfile{});
  config.target.host = "192.0.2.1";
  TcpDelayProxy tcp_proxy(config);
  EXPECT_EQ(tcp_proxy.Start(), boost::system::errc::permission_denied);
  UdpDelayProxy udp_proxy(config);
  EXPECT_EQ(udp_proxy.Start(), boost::system::errc::permission_denied);
}

// ---------------------------------------------------------------- TCP

TEST(TcpDelayProxyTest, PortKnownOnlyAfterStartAndStartsOnce) {
  TcpEchoServer server;
  TcpDelayProxy proxy(ConfigTo(server.port(), LinkProfile{}));
  EXPECT_EQ(proxy.port(), 0);
  ASSERT_FALSE(proxy.Start());
  EXPECT_NE(proxy.port(), 0);
  EXPECT_EQ(proxy.Start(), asio::error::already_started);
  proxy.Stop();
  proxy.Stop();  // idempotent
  EXPECT_EQ(proxy.Start(), asio::error::already_started);
}

TEST(TcpDelayProxyTest, EchoIsByteExactAndOrderedUnderJitter) {
  TcpEchoServer server;
  // Jitter wider than the delay, so consecutive chunks often draw delays out
  // of order; the stream must still arrive intact and in order.
  LinkProfile p = LinkProfile::Symmetric(Duration::Millis(1),
                                         Jitter::Uniform(Duration::Millis(4)),
                                         /*loss=*/0.5, /*seed=*/3);  // loss ignored for TCP
  TcpDelayProxy proxy(ConfigTo(server.port(), p));
  ASSERT_FALSE(proxy.Start());

  const std::string sent = Pattern(200 * 1024, 1);
  TcpClient client;
  client.Connect(proxy.port());
  // Many small writes, each likely its own chunk in the proxy.
  client.StartWritingThenShutdown(sent, 2);
  boost::system::error_code ec;
  const std::string received = client.ReadToEnd(&ec);

  EXPECT_EQ(ec, asio::error::eof);  // the EOF travelled both ways, after the data
  EXPECT_EQ(received.size(), sent.size());
  EXPECT_TRUE(received == sent);
  const LinkCounters c = proxy.counters();
  EXPECT_EQ(c.forward.delivered_bytes, sent.size());
  EXPECT_EQ(c.backward.delivered_bytes, sent.size());
  EXPECT_GT(c.forward.delivered_chunks, 1u);
  EXPECT_EQ(c.forward.dropped_chunks, 0u);
  EXPECT_EQ(c.connections, 1u);
}

TEST(TcpDelayProxyTest, EachDirectionIsDelayedAtLeastItsConfiguredDelay) {
  TcpEchoServer server;
  LinkProfile p;
  p.forward_delay = Duration::Millis(30);
  p.backward_delay = Duration::Millis(60);
  TcpDelayProxy proxy(ConfigTo(server.port(), p));
  ASSERT_FALSE(proxy.Start());
  TcpClient client;
  client.Connect(proxy.port());

  for (int i = 0; i < 5; ++i) {
    const auto sent_at = SteadyClock::now();
    client.Write("x");
    ASSERT_EQ(client.Read(1), "x");
    const auto echoed_at = SteadyClock::now();
    const auto times = server.read_times();
    ASSERT_EQ(times.size(), static_cast<size_t>(i + 1));
    // Causal lower bounds: the server cannot read before send + forward
    // delay; the echo, written after that read, cannot come back before
    // + backward delay.
    EXPECT_GE(times.back() - sent_at, ToChrono(p.forward_delay));
    EXPECT_GE(echoed_at - times.back(), ToChrono(p.backward_delay));
  }
}

TEST(TcpDelayProxyTest, DropAllResetsBothSidesAndKeepsListening) {
  TcpEchoServer server;
  TcpDelayProxy proxy(ConfigTo(server.port(), LinkProfile{}));
  ASSERT_FALSE(proxy.Start());
  TcpClient client;
  client.Connect(proxy.port());
  client.Write("ping");
  ASSERT_EQ(client.Read(4), "ping");

  proxy.DropAll();
  boost::system::error_code ec;
  EXPECT_EQ(client.ReadToEnd(&ec), "");
  EXPECT_NE(ec, asio::error::timed_out);
  EXPECT_TRUE(ec);  // a reset (or EOF): the connection is over either way
  EXPECT_TRUE(WaitUntil([&] { return server.ended() == 1; }));

  TcpClient again;
  again.Connect(proxy.port());
  again.Write("pong");
  EXPECT_EQ(again.Read(4), "pong");
  EXPECT_EQ(proxy.counters().connections, 2u);
}

TEST(TcpDelayProxyTest, BlackholeResetsNewConnectionsOnly) {
  TcpEchoServer server;
  TcpDelayProxy proxy(ConfigTo(server.port(), LinkProfile{}));
  ASSERT_FALSE(proxy.Start());
  TcpClient old_client;
  old_client.Connect(proxy.port());
  old_client.Write("a");
  ASSERT_EQ(old_client.Read(1), "a");

  proxy.SetBlackhole(true);
  TcpClient refused;
  boost::system::error_code ec;
  refused.socket().connect(tcp::endpoint(asio::ip::address_v4::loopback(), proxy.port()),
                           ec);
  if (!ec) {  // the kernel may complete the handshake before the reset
    EXPECT_EQ(refused.ReadToEnd(&ec), "");
    EXPECT_NE(ec, asio::error::timed_out);
    EXPECT_TRUE(ec);
  }
  EXPECT_TRUE(WaitUntil([&] { return proxy.counters().refused == 1; }));
  old_client.Write("b");
  EXPECT_EQ(old_client.Read(1), "b");

  proxy.SetBlackhole(false);
  TcpClient fresh;
  fresh.Connect(proxy.port());
  fresh.Write("c");
  EXPECT_EQ(fresh.Read(1), "c");
}

TEST(TcpDelayProxyTest, StopEndsConnections) {
  TcpEchoServer server;
  TcpDelayProxy proxy(ConfigTo(server.port(), LinkProfile{}));
  ASSERT_FALSE(proxy.Start());
  TcpClient client;
  client.Connect(proxy.port());
  client.Write("a");
  ASSERT_EQ(client.Read(1), "a");
  proxy.Stop();
  boost::system::error_code ec;
  client.ReadToEnd(&ec);
  EXPECT_NE(ec, asio::error::timed_out);
  EXPECT_TRUE(ec);
}

// ---------------------------------------------------------------- UDP

TEST(UdpDelayProxyTest, EchoIsByteExactPerDatagram) {
  UdpEchoServer server;
  UdpDelayProxy proxy(ConfigTo(server.port(), LinkProfile::Symmetric(Duration::Millis(2))));
  ASSERT_FALSE(proxy.Start());
  UdpClient client(proxy.port());
  for (uint32_t i = 0; i < 50; ++i) {
    const std::string datagram = Pattern(1 + (i * 397) % 1400, i);
    client.Send(datagram);
    const auto echoed = client.Receive();
    ASSERT_TRUE(echoed) << i;
    EXPECT_TRUE(*echoed == datagram) << i;
  }
  // A send's completion is counted after the kernel may already have handed
  // the datagram on, so the last count can trail the echo a little.
  EXPECT_TRUE(WaitUntil([&] { return proxy.counters().backward.delivered_chunks == 50; }));
  const LinkCounters c = proxy.counters();
  EXPECT_EQ(c.forward.delivered_chunks, 50u);
  EXPECT_EQ(c.connections, 1u);  // one client address, one flow
}

TEST(UdpDelayProxyTest, JitterMayReorderButDeliversEachDatagramOnce) {
  UdpEchoServer server;
  UdpDelayProxy proxy(ConfigTo(
      server.port(),
      LinkProfile::Symmetric(Duration::Millis(2), Jitter::Uniform(Duration::Millis(2)))));
  ASSERT_FALSE(proxy.Start());
  UdpClient client(proxy.port());
  constexpr int kCount = 300;
  constexpr int kWindow = 16;  // in flight at once, far below any socket buffer
  std::vector<std::string> sent;
  std::vector<std::string> got;
  for (int i = 0; i < kCount; ++i) {
    if (static_cast<int>(sent.size() - got.size()) >= kWindow) {
      auto d = client.Receive();
      ASSERT_TRUE(d);
      got.push_back(*d);
    }
    sent.push_back("datagram " + std::to_string(i));
    client.Send(sent.back());
  }
  while (got.size() < sent.size()) {
    auto d = client.Receive();
    ASSERT_TRUE(d);
    got.push_back(*d);
  }
  std::sort(sent.begin(), sent.end());
  std::sort(got.begin(), got.end());
  EXPECT_EQ(got, sent);
}

TEST(UdpDelayProxyTest, LossRateIsPlausibleForAFixedSeed) {
  UdpEchoServer server;
  LinkProfile p;
  p.forward_loss = 0.1;
  p.seed = 11;
  UdpDelayProxy proxy(ConfigTo(server.port(), p));
  ASSERT_FALSE(proxy.Start());
  UdpClient client(proxy.port());
  constexpr uint64_t kCount = 2000;
  constexpr uint64_t kWindow = 64;  // keeps the kernel from dropping any on its own
  for (uint64_t i = 0; i < kCount; ++i) {
    ASSERT_TRUE(WaitUntil([&] { return proxy.counters().forward.received_chunks + kWindow > i; }));
    client.Send("p" + std::to_string(i));
  }
  ASSERT_TRUE(WaitUntil([&] {
    const auto f = proxy.counters().forward;
    return f.delivered_chunks + f.dropped_chunks == kCount;
  }));
  const LinkCounters c = proxy.counters();
  // Binomial(2000, 0.1): mean 200, σ ≈ 13.4; 10% ± 5% is beyond 7σ
  // (common practice, no source).
  EXPECT_GE(c.forward.dropped_chunks, 100u);
  EXPECT_LE(c.forward.dropped_chunks, 300u);
  EXPECT_EQ(c.forward.received_chunks, kCount);
}

TEST(UdpDelayProxyTest, BlackholeDropsEverything) {
  UdpEchoServer server;
  UdpDelayProxy proxy(ConfigTo(server.port(), LinkProfile{}));
  ASSERT_FALSE(proxy.Start());
  proxy.SetBlackhole(true);
  UdpClient client(proxy.port());
  for (int i = 0; i < 10; ++i) client.Send("lost");
  EXPECT_TRUE(WaitUntil([&] { return proxy.counters().forward.dropped_chunks == 10; }));
  EXPECT_EQ(proxy.counters().forward.delivered_chunks, 0u);
  proxy.SetBlackhole(false);
  client.Send("kept");
  EXPECT_EQ(client.Receive(), "kept");
}

// ---------------------------------------------------------------- clock

TEST(SimulatedClockTest, OffsetOnly) {
  FakeMonotonic mono(5'000'000'000);
  SimulatedClock clock(&mono, Duration::Millis(-250), 0.0);
  EXPECT_EQ(clock.Now().nanos(), 4'750'000'000);
  mono.Advance(Duration::Seconds(3));
  EXPECT_EQ(clock.Now().nanos(), 7'750'000'000);
}

TEST(SimulatedClockTest, DriftAccumulatesWithElapsedTime) {
  FakeMonotonic mono(1'000'000'000);
  SimulatedClock clock(&mono, Duration::Millis(500), 100.0);
  mono.Advance(Duration::Seconds(64));
  // 100 ppm over 64 s is 6.4 ms (RFC 5905 §8).
  EXPECT_EQ(clock.Now() - ClientTime::FromNanos(1'000'000'000),
            Duration::Millis(500) + Duration::Seconds(64) + Duration::Micros(6400));

  SimulatedClock slow(&mono, Duration::Zero(), -50.0);
  mono.Advance(Duration::Seconds(10));
  // −50 ppm over 10 s is −0.5 ms (arithmetic).
  EXPECT_EQ(slow.Now().nanos(), 65'000'000'000 + 10'000'000'000 - 500'000);
}

TEST(SimulatedClockTest, JumpStepsTheOffsetAndAtMapsAnyInstant) {
  FakeMonotonic mono(2'000'000'000);
  SimulatedClock clock(&mono, Duration::Seconds(1), 20.0);
  clock.Jump(-Duration::Millis(300));
  EXPECT_EQ(clock.offset(), Duration::Millis(700));
  // 20 ppm of 5 s is 100 µs (arithmetic).
  EXPECT_EQ(clock.At(7'000'000'000).nanos(),
            int64_t{2'000'000'000} + 700'000'000 + 5'000'000'000 + 100'000);
  // Before construction the drift runs backwards too: 20 ppm of −1 s.
  EXPECT_EQ(clock.At(1'000'000'000).nanos(),
            int64_t{2'000'000'000} + 700'000'000 - 1'000'000'000 - 20'000);
  EXPECT_EQ(clock.Now().nanos(), 2'700'000'000);
}

}  // namespace
}  // namespace tickmark::linkemu

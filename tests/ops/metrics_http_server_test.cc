// The metrics-only port (server/ops/metrics_http_server.h) over a real
// loopback socket, with Boost.Beast's HTTP client: GET /metrics answers the
// registry's text with the text format's media type, other paths 404,
// other methods 405; a client that never sends a request does not stop
// Stop(); a bad address is refused.
#include "server/ops/metrics_http_server.h"

#include <gtest/gtest.h>

#include <boost/asio.hpp>
#include <boost/beast/core.hpp>
#include <boost/beast/http.hpp>

#include "server/ops/metrics.h"

namespace tickmark::ops {
namespace {

namespace beast = boost::beast;
namespace http = beast::http;
namespace asio = boost::asio;
using tcp = asio::ip::tcp;

http::response<http::string_body> Request(int port, http::verb verb, const std::string& target) {
  asio::io_context ioc;
  beast::tcp_stream stream(ioc);
  stream.connect(tcp::endpoint(asio::ip::make_address("127.0.0.1"),
                               static_cast<unsigned short>(port)));
  http::request<http::string_body> req(verb, target, 11);
  req.set(http::field::host, "127.0.0.1");
  http::write(stream, req);
  beast::flat_buffer buffer;
  http::response<http::string_body> res;
  http::read(stream, buffer, res);
  return res;
}

TEST(MetricsHttpServerTest, ServesMetricsOnlyAtMetrics) {
  Registry registry;
  registry.AddCounter("demo_total", "n").With({}).Inc(3);
  auto server = MetricsHttpServer::Start("127.0.0.1:0", [&] { return registry.Render(); });
  ASSERT_TRUE(server.ok()) << server.status();
  const int port = (*server)->port();
  ASSERT_GT(port, 0);
  // A client that connects and says nothing must not hold up Stop().
  asio::io_context idle_ioc;
  tcp::socket idle(idle_ioc);
  idle.connect(tcp::endpoint(asio::ip::make_address("127.0.0.1"),
                             static_cast<unsigned short>(port)));

  auto ok = Request(port, http::verb::get, "/metrics?x=1");
  EXPECT_EQ(ok.result_int(), 200);
  // Prometheus text format 0.0.4's media type (from memory).
  EXPECT_EQ(ok[http::field::content_type], "text/plain; version=0.0.4; charset=utf-8");
  EXPECT_NE(ok.body().find("demo_total 3\n"), std::string::npos);
  EXPECT_EQ(Request(port, http::verb::get, "/").result_int(), 404);
  EXPECT_EQ(Request(port, http::verb::post, "/metrics").result_int(), 405);
  (*server)->Stop();
  (*server)->Stop();  // idempotent
}

TEST(MetricsHttpServerTest, RefusesWhatIsNotIpAndPort) {
  for (const char* bad : {"127.0.0.1", "127.0.0.1:x", "127.0.0.1:70000", "example.org:9461"}) {
    auto server = MetricsHttpServer::Start(bad, [] { return std::string(); });
    EXPECT_EQ(server.status().code(), absl::StatusCode::kInvalidArgument) << bad;
  }
}

}  // namespace
}  // namespace tickmark::ops

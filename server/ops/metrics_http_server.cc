#include "server/ops/metrics_http_server.h"

#include <atomic>
#include <boost/asio.hpp>
#include <boost/beast/core.hpp>
#include <boost/beast/http.hpp>
#include <chrono>
#include <thread>

#include "server/ops/metrics.h"

namespace tickmark::ops {

namespace beast = boost::beast;
namespace http = beast::http;
namespace asio = boost::asio;
using tcp = asio::ip::tcp;

// Handlers hold a plain Impl*: they live in ioc, which Impl's destructor
// destroys (with every pending handler) before `open` and `render`, so no
// handler outlives what it points at and nothing keeps Impl alive in a cycle.
struct MetricsHttpServer::Impl {
  std::function<std::string()> render;
  std::atomic<size_t> open{0};
  asio::io_context ioc{1};
  tcp::acceptor acceptor{ioc};
  std::thread thread;
  bool stopped = false;

  void DoAccept();
};

namespace {

constexpr auto kReadTimeout = std::chrono::seconds(10);

class Connection : public std::enable_shared_from_this<Connection> {
 public:
  Connection(tcp::socket socket, MetricsHttpServer::Impl* impl)
      : stream_(std::move(socket)), impl_(impl) {
    impl_->open.fetch_add(1);
  }
  ~Connection() { impl_->open.fetch_sub(1); }

  void Run() {
    parser_.header_limit(8192);
    parser_.body_limit(1024);
    stream_.expires_after(kReadTimeout);
    http::async_read(stream_, buffer_, parser_,
                     [self = shared_from_this()](beast::error_code ec, size_t) {
                       if (!ec) self->Answer();
                     });
  }

 private:
  void Answer() {
    const auto& req = parser_.get();
    std::string target(req.target());
    target = target.substr(0, target.find('?'));
    response_.version(11);
    response_.keep_alive(false);
    response_.set(http::field::cache_control, "no-store");
    response_.set("X-Content-Type-Options", "nosniff");
    if (target != "/metrics") {
      response_.result(http::status::not_found);
      response_.set(http::field::content_type, "text/plain; charset=utf-8");
      response_.body() = "not found (this port serves /metrics only)\n";
    } else if (req.method() != http::verb::get && req.method() != http::verb::head) {
      response_.result(http::status::method_not_allowed);
      response_.set(http::field::allow, "GET, HEAD");
      response_.set(http::field::content_type, "text/plain; charset=utf-8");
      response_.body() = "use GET\n";
    } else {
      response_.result(http::status::ok);
      response_.set(http::field::content_type, kContentType);
      std::string body = impl_->render();
      if (req.method() == http::verb::get) {
        response_.body() = std::move(body);
      } else {
        response_.content_length(body.size());
      }
    }
    if (req.method() != http::verb::head) response_.prepare_payload();
    stream_.expires_after(kReadTimeout);
    http::async_write(stream_, response_, [self = shared_from_this()](beast::error_code, size_t) {
      beast::error_code ignored;
      self->stream_.socket().shutdown(tcp::socket::shutdown_send, ignored);
    });
  }

  beast::tcp_stream stream_;
  MetricsHttpServer::Impl* const impl_;
  beast::flat_buffer buffer_;
  http::request_parser<http::string_body> parser_;
  http::response<http::string_body> response_;
};

}  // namespace

void MetricsHttpServer::Impl::DoAccept() {
  acceptor.async_accept([self = this](beast::error_code ec, tcp::socket socket) {
    if (ec == asio::error::operation_aborted || !self->acceptor.is_open()) return;
    if (!ec) {
      if (self->open.load() < kMaxConnections) {
        std::make_shared<Connection>(std::move(socket), self)->Run();
      }  // else the socket closes here: a scraper retries on its next interval
    }
    self->DoAccept();
  });
}

absl::StatusOr<std::unique_ptr<MetricsHttpServer>> MetricsHttpServer::Start(
    const std::string& listen, std::function<std::string()> render) {
  const size_t colon = listen.rfind(':');
  int port = -1;
  std::string host;
  if (colon != std::string::npos) {
    host = listen.substr(0, colon);
    if (host.size() >= 2 && host.front() == '[' && host.back() == ']') {
      host = host.substr(1, host.size() - 2);
    }
    try {
      size_t used = 0;
      port = std::stoi(listen.substr(colon + 1), &used);
      if (used != listen.size() - colon - 1) port = -1;
    } catch (const std::exception&) {
      port = -1;
    }
  }
  if (port < 0 || port > 65535) {
    return absl::InvalidArgumentError("metrics port: " + listen + " is not HOST:PORT");
  }
  beast::error_code ec;
  const asio::ip::address address =
      asio::ip::make_address(host == "localhost" ? std::string("127.0.0.1") : host, ec);
  if (ec) {
    return absl::InvalidArgumentError("metrics port: " + host +
                                      " is not an IP address (give one, e.g. 127.0.0.1)");
  }
  std::unique_ptr<MetricsHttpServer> server(new MetricsHttpServer());
  server->impl_ = std::make_unique<Impl>();
  Impl& impl = *server->impl_;
  impl.render = std::move(render);
  const tcp::endpoint endpoint(address, static_cast<unsigned short>(port));
  impl.acceptor.open(endpoint.protocol(), ec);
  if (!ec) impl.acceptor.set_option(asio::socket_base::reuse_address(true), ec);
  if (!ec) impl.acceptor.bind(endpoint, ec);
  if (!ec) impl.acceptor.listen(asio::socket_base::max_listen_connections, ec);
  if (ec) {
    return absl::UnavailableError("metrics port: cannot listen on " + listen + ": " + ec.message());
  }
  server->port_ = impl.acceptor.local_endpoint().port();
  impl.DoAccept();
  impl.thread = std::thread([&impl] { impl.ioc.run(); });
  return server;
}

void MetricsHttpServer::Stop() {
  if (!impl_ || impl_->stopped) return;
  impl_->stopped = true;
  // Closing the acceptor ends the accept loop; stop() drops the connections
  // still waiting for a request.
  asio::post(impl_->ioc, [impl = impl_.get()] {
    beast::error_code ec;
    impl->acceptor.close(ec);
    impl->ioc.stop();
  });
  if (impl_->thread.joinable()) impl_->thread.join();
}

MetricsHttpServer::~MetricsHttpServer() { Stop(); }

}  // namespace tickmark::ops

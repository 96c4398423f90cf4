#include "server/web/http_server.h"

#include <boost/asio/ssl.hpp>
#include <boost/asio/strand.hpp>
#include <boost/beast/core.hpp>
#include <boost/beast/http.hpp>
#include <boost/beast/ssl.hpp>
#include <boost/beast/websocket.hpp>
#include <boost/beast/websocket/ssl.hpp>
#include <deque>
#include <map>
#include <mutex>
#include <optional>
#include <thread>
#include <vector>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/net/address.h"
#include "server/web/page_messages.h"

namespace tickmark::web {

namespace beast = boost::beast;
namespace http = beast::http;
namespace websocket = beast::websocket;
namespace asio = boost::asio;
namespace ssl = asio::ssl;
using tcp = asio::ip::tcp;

namespace {

constexpr auto kRequestTimeout = std::chrono::seconds(30);
constexpr auto kHandshakeTimeout = std::chrono::seconds(10);
constexpr uint32_t kHeaderLimit = 8192;

// Open connections, in total and per client address, and the relays open,
// so Stop() can reach them. Shared by the connections (through Ticket), so
// it outlives the io_context's last handler.
struct Registry {
  std::mutex mu;
  size_t total = 0;                          // GUARDED_BY(mu)
  std::map<std::string, size_t> peers;       // GUARDED_BY(mu)
  std::vector<std::weak_ptr<Relay>> relays;  // GUARDED_BY(mu); pruned on add
  bool stopping = false;                     // GUARDED_BY(mu)
};

// One admitted connection; gives its place back when the last part of the
// connection (HTTP or WebSocket session) is gone.
class Ticket {
 public:
  Ticket(std::shared_ptr<Registry> registry, std::string peer)
      : registry_(std::move(registry)), peer_(std::move(peer)) {}
  ~Ticket() {
    std::lock_guard<std::mutex> lock(registry_->mu);
    --registry_->total;
    if (--registry_->peers[peer_] == 0) registry_->peers.erase(peer_);
  }
  const std::string& peer() const { return peer_; }

 private:
  std::shared_ptr<Registry> registry_;
  std::string peer_;
};

struct Shared {
  HttpServer::Options options;
  const HttpRouter* router = nullptr;
  HttpServer::RelayFactory relays;
  std::shared_ptr<Registry> registry = std::make_shared<Registry>();
};

// The TCP stream under a (TLS) stream.
template <class Stream>
beast::tcp_stream& Tcp(Stream& s) {
  return beast::get_lowest_layer(s);
}

template <class Stream>
constexpr bool kIsTls = !std::is_same_v<Stream, beast::tcp_stream>;

template <class Stream>
class WsSession final : public PageSocket, public std::enable_shared_from_this<WsSession<Stream>> {
 public:
  WsSession(Stream&& stream, std::shared_ptr<Shared> shared, std::shared_ptr<Ticket> ticket)
      : ws_(std::move(stream)),
        executor_(ws_.get_executor()),
        shared_(std::move(shared)),
        ticket_(std::move(ticket)) {}

  void Accept(http::request<http::string_body> req, HttpRequest info, std::string path) {
    websocket::stream_base::timeout t;
    t.handshake_timeout = kHandshakeTimeout;
    t.idle_timeout = std::chrono::nanoseconds(shared_->options.socket_idle_timeout.nanos());
    t.keep_alive_pings = true;  // a ping at half the idle time; a silent page is closed
    ws_.set_option(t);
    ws_.set_option(
        websocket::stream_base::decorator([tls = kIsTls<Stream>](websocket::response_type& res) {
          for (const auto& [k, v] : SecurityHeaders(tls)) res.set(k, v);
        }));
    ws_.read_message_max(kMaxPageMessageBytes);
    ws_.text(true);
    auto self = this->shared_from_this();
    ws_.async_accept(
        req, [self, info = std::move(info), path = std::move(path)](beast::error_code ec) mutable {
          if (ec) return;
          self->Opened(info, path);
        });
  }

  // PageSocket: from any thread, onto the strand.
  void Send(std::string text) override {
    asio::post(executor_, [self = this->shared_from_this(), text = std::move(text)]() mutable {
      self->DoSend(std::move(text));
    });
  }
  void Close() override {
    asio::post(executor_, [self = this->shared_from_this()] {
      self->closing_ = true;
      if (!self->writing_) self->DoClose();
    });
  }

 private:
  void Opened(const HttpRequest& info, const std::string& path) {
    relay_ = shared_->relays(path, this->shared_from_this(), info);
    if (!relay_) {
      closing_ = true;
      DoClose();
      return;
    }
    {
      std::lock_guard<std::mutex> lock(shared_->registry->mu);
      auto& relays = shared_->registry->relays;
      std::erase_if(relays, [](const std::weak_ptr<Relay>& r) { return r.expired(); });
      relays.push_back(relay_);
      if (shared_->registry->stopping) relay_->OnPageClosed();
    }
    DoRead();
  }

  void DoRead() {
    ws_.async_read(buffer_, [self = this->shared_from_this()](beast::error_code ec, size_t) {
      self->OnRead(ec);
    });
  }

  void OnRead(beast::error_code ec) {
    if (ec) return Gone();
    if (!ws_.got_text()) {
      buffer_.consume(buffer_.size());
      DoSend(EndToPage(3, "send text messages (JSON)"));
      closing_ = true;
      if (!writing_) DoClose();
      return Gone();
    }
    std::string text = beast::buffers_to_string(buffer_.data());
    buffer_.consume(buffer_.size());
    if (relay_) relay_->OnPageMessage(std::move(text));
    DoRead();
  }

  // The page is gone (or the socket broke): the relay cancels its call.
  void Gone() {
    if (relay_) {
      relay_->OnPageClosed();
      relay_.reset();
    }
  }

  void DoSend(std::string text) {
    if (closing_ || close_started_) return;
    queued_bytes_ += text.size();
    queue_.push_back(std::move(text));
    if (queued_bytes_ > shared_->options.max_queued_bytes) {
      // Never wait for a slow page: drop it; it reconnects and resumes.
      TM_LOG(kWarning) << "web: dropping a page at " << ticket_->peer()
                       << " that reads too slowly (" << queued_bytes_ << " bytes waiting)";
      while (queue_.size() > (writing_ ? 1u : 0u)) {
        queued_bytes_ -= queue_.back().size();
        queue_.pop_back();
      }
      close_reason_ = websocket::close_reason(websocket::close_code::try_again_later,
                                              "too slow: reconnect to resume");
      closing_ = true;
      if (!writing_) DoClose();
      return;
    }
    if (!writing_) DoWrite();
  }

  void DoWrite() {
    writing_ = true;
    ws_.async_write(
        asio::buffer(queue_.front()),
        [self = this->shared_from_this()](beast::error_code ec, size_t) { self->OnWrite(ec); });
  }

  void OnWrite(beast::error_code ec) {
    writing_ = false;
    queued_bytes_ -= queue_.front().size();
    queue_.pop_front();
    if (ec) {
      queue_.clear();
      queued_bytes_ = 0;
      return;  // the read fails too, and ends the relay
    }
    if (!queue_.empty()) return DoWrite();
    if (closing_) DoClose();
  }

  void DoClose() {
    if (close_started_) return;
    close_started_ = true;
    ws_.async_close(close_reason_, [self = this->shared_from_this()](beast::error_code) {});
  }

  websocket::stream<Stream> ws_;
  // The connection's strand; set once, so any thread may post to it.
  const typename websocket::stream<Stream>::executor_type executor_;
  std::shared_ptr<Shared> shared_;
  std::shared_ptr<Ticket> ticket_;
  beast::flat_buffer buffer_;
  std::shared_ptr<Relay> relay_;
  // The rest is touched on the strand only.
  std::deque<std::string> queue_;  // front is being written while writing_
  size_t queued_bytes_ = 0;
  bool writing_ = false;
  bool closing_ = false;  // close once the queue is written
  bool close_started_ = false;
  websocket::close_reason close_reason_{websocket::close_code::normal};
};

template <class Stream>
class HttpSession final : public std::enable_shared_from_this<HttpSession<Stream>> {
 public:
  HttpSession(Stream&& stream, std::shared_ptr<Shared> shared, std::shared_ptr<Ticket> ticket)
      : stream_(std::move(stream)), shared_(std::move(shared)), ticket_(std::move(ticket)) {}

  void Run() {
    if constexpr (kIsTls<Stream>) {
      Tcp(stream_).expires_after(kHandshakeTimeout);
      stream_.async_handshake(ssl::stream_base::server,
                              [self = this->shared_from_this()](beast::error_code ec) {
                                if (ec) return;  // not TLS, or a bad client: just close
                                self->DoRead();
                              });
    } else {
      DoRead();
    }
  }

 private:
  void DoRead() {
    parser_.emplace();
    parser_->header_limit(kHeaderLimit);
    parser_->body_limit(kMaxRequestBody);
    Tcp(stream_).expires_after(kRequestTimeout);
    http::async_read(
        stream_, buffer_, *parser_,
        [self = this->shared_from_this()](beast::error_code ec, size_t) { self->OnRead(ec); });
  }

  void OnRead(beast::error_code ec) {
    if (ec == http::error::end_of_stream) return DoClose();
    if (ec == http::error::body_limit || ec == http::error::header_limit) {
      HttpResponse r;
      r.status = ec == http::error::body_limit ? 413 : 431;
      r.headers = SecurityHeaders(kIsTls<Stream>);
      r.headers.emplace_back("Content-Type", "text/plain; charset=utf-8");
      r.body = "request too large\n";
      return Write(r, false, 11);
    }
    if (ec) return;
    http::request<http::string_body> req = parser_->release();
    HttpRequest info;
    info.method = std::string(req.method_string());
    info.target = std::string(req.target());
    info.content_type = std::string(req[http::field::content_type]);
    info.if_none_match = std::string(req[http::field::if_none_match]);
    info.origin = std::string(req[http::field::origin]);
    info.host = std::string(req[http::field::host]);
    info.user_agent = std::string(req[http::field::user_agent]);
    info.peer = ticket_->peer();
    info.tls = kIsTls<Stream>;
    if (websocket::is_upgrade(req)) {
      const std::string path = PathOf(info.target);
      if (path != kTrainSocketPath && path != kLiveSocketPath) {
        HttpResponse r;
        r.status = 404;
        r.headers = SecurityHeaders(info.tls);
        return Write(r, false, req.version());
      }
      if (!shared_->router->OriginAllowed(info)) {
        HttpResponse r;
        r.status = 403;
        r.headers = SecurityHeaders(info.tls);
        r.body = "WebSockets are for this server's own pages\n";
        return Write(r, false, req.version());
      }
      Tcp(stream_).expires_never();
      std::make_shared<WsSession<Stream>>(std::move(stream_), shared_, ticket_)
          ->Accept(std::move(req), std::move(info), path);
      return;
    }
    info.body = std::move(req.body());
    Write(shared_->router->Route(info), req.keep_alive(), req.version());
  }

  void Write(const HttpResponse& r, bool keep_alive, unsigned version) {
    auto res = std::make_shared<http::response<http::string_body>>(
        static_cast<http::status>(r.status), version);
    for (const auto& [k, v] : r.headers) res->set(k, v);
    res->body() = r.body;
    res->keep_alive(keep_alive);
    res->prepare_payload();
    http::async_write(
        stream_, *res,
        [self = this->shared_from_this(), res, keep_alive](beast::error_code ec, size_t) {
          if (ec) return;
          if (!keep_alive) return self->DoClose();
          self->DoRead();
        });
  }

  void DoClose() {
    if constexpr (kIsTls<Stream>) {
      Tcp(stream_).expires_after(kHandshakeTimeout);
      stream_.async_shutdown([self = this->shared_from_this()](beast::error_code) {});
    } else {
      beast::error_code ec;
      stream_.socket().shutdown(tcp::socket::shutdown_send, ec);
    }
  }

  Stream stream_;
  std::shared_ptr<Shared> shared_;
  std::shared_ptr<Ticket> ticket_;
  beast::flat_buffer buffer_;
  std::optional<http::request_parser<http::string_body>> parser_;
};

}  // namespace

struct HttpServer::Impl {
  std::shared_ptr<Shared> shared = std::make_shared<Shared>();
  asio::io_context ioc;
  std::optional<ssl::context> tls;
  tcp::acceptor acceptor{ioc};
  std::vector<std::thread> threads;
  bool stopped = false;

  void DoAccept() {
    acceptor.async_accept(asio::make_strand(ioc), [this](beast::error_code ec, tcp::socket s) {
      if (ec == asio::error::operation_aborted || !acceptor.is_open()) return;
      if (!ec) OnAccept(std::move(s));
      DoAccept();
    });
  }

  void OnAccept(tcp::socket socket) {
    beast::error_code ec;
    const tcp::endpoint remote = socket.remote_endpoint(ec);
    if (ec) return;
    // Small messages both ways (probes and their replies, acks): without
    // this, Nagle's algorithm holds a write until the previous one is
    // acknowledged, which a delayed ACK can stretch to tens of ms, and
    // clock probes would measure that.
    socket.set_option(tcp::no_delay(true), ec);
    std::string peer = remote.address().to_string();
    Registry& reg = *shared->registry;
    {
      std::lock_guard<std::mutex> lock(reg.mu);
      if (reg.stopping || reg.total >= shared->options.max_connections ||
          reg.peers[peer] >= shared->options.max_connections_per_peer) {
        if (reg.peers[peer] == 0) reg.peers.erase(peer);
        return;  // closed as it goes out of scope
      }
      ++reg.total;
      ++reg.peers[peer];
    }
    auto ticket = std::make_shared<Ticket>(shared->registry, std::move(peer));
    beast::tcp_stream tcp_stream(std::move(socket));
    if (tls) {
      std::make_shared<HttpSession<beast::ssl_stream<beast::tcp_stream>>>(
          beast::ssl_stream<beast::tcp_stream>(std::move(tcp_stream), *tls), shared, ticket)
          ->Run();
    } else {
      std::make_shared<HttpSession<beast::tcp_stream>>(std::move(tcp_stream), shared, ticket)
          ->Run();
    }
  }
};

absl::StatusOr<std::unique_ptr<HttpServer>> HttpServer::Start(const Options& options,
                                                              const HttpRouter* router,
                                                              RelayFactory relays) {
  std::unique_ptr<HttpServer> server(new HttpServer());
  server->impl_ = std::make_shared<Impl>();
  Impl& impl = *server->impl_;
  impl.shared->options = options;
  impl.shared->router = router;
  impl.shared->relays = std::move(relays);

  if (options.cert_pem.empty() != options.key_pem.empty()) {
    return absl::InvalidArgumentError("web port: give both a certificate and a key, or neither");
  }
  if (!options.cert_pem.empty()) {
    impl.tls.emplace(ssl::context::tls_server);
    beast::error_code ec;
    impl.tls->set_options(ssl::context::default_workarounds | ssl::context::no_sslv2 |
                              ssl::context::no_sslv3 | ssl::context::no_tlsv1 |
                              ssl::context::no_tlsv1_1 | ssl::context::single_dh_use,
                          ec);
    if (!ec) impl.tls->use_certificate_chain(asio::buffer(options.cert_pem), ec);
    if (!ec) impl.tls->use_private_key(asio::buffer(options.key_pem), ssl::context::pem, ec);
    if (ec) return absl::InvalidArgumentError(Cat("web port TLS: ", ec.message()));
  }

  const std::string host = net::HostOf(options.listen);
  const size_t colon = options.listen.rfind(':');
  int port = -1;
  if (colon != std::string::npos) {
    try {
      port = std::stoi(options.listen.substr(colon + 1));
    } catch (const std::exception&) {
      port = -1;
    }
  }
  if (port < 0 || port > 65535) {
    return absl::InvalidArgumentError(Cat("web port: ", options.listen, " is not HOST:PORT"));
  }
  beast::error_code ec;
  asio::ip::address address =
      asio::ip::make_address(host == "localhost" ? std::string("127.0.0.1") : host, ec);
  if (ec) {
    return absl::InvalidArgumentError(
        Cat("web port: ", host, " is not an IP address (give one, e.g. 0.0.0.0 or 127.0.0.1)"));
  }
  const tcp::endpoint endpoint(address, static_cast<unsigned short>(port));
  impl.acceptor.open(endpoint.protocol(), ec);
  if (!ec) impl.acceptor.set_option(asio::socket_base::reuse_address(true), ec);
  if (!ec) impl.acceptor.bind(endpoint, ec);
  if (!ec) impl.acceptor.listen(asio::socket_base::max_listen_connections, ec);
  if (ec)
    return absl::UnavailableError(
        Cat("web port: cannot listen on ", options.listen, ": ", ec.message()));
  server->port_ = impl.acceptor.local_endpoint().port();
  impl.DoAccept();
  for (int i = 0; i < std::max(1, options.threads); ++i) {
    impl.threads.emplace_back([&impl] { impl.ioc.run(); });
  }
  return server;
}

bool HttpServer::tls() const { return impl_ && impl_->tls.has_value(); }

void HttpServer::CancelRelays() {
  if (!impl_) return;
  std::vector<std::shared_ptr<Relay>> open;
  {
    Registry& reg = *impl_->shared->registry;
    std::lock_guard<std::mutex> lock(reg.mu);
    reg.stopping = true;
    for (auto& w : reg.relays) {
      if (auto r = w.lock()) open.push_back(std::move(r));
    }
  }
  asio::post(impl_->ioc, [impl = impl_.get()] {
    beast::error_code ec;
    impl->acceptor.close(ec);
  });
  for (auto& r : open) r->OnPageClosed();
}

void HttpServer::Stop() {
  if (!impl_ || impl_->stopped) return;
  impl_->stopped = true;
  CancelRelays();
  impl_->ioc.stop();
  for (std::thread& t : impl_->threads) t.join();
  impl_->threads.clear();
}

HttpServer::~HttpServer() { Stop(); }

}  // namespace tickmark::web

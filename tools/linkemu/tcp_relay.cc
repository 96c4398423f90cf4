#include "tools/linkemu/tcp_relay.h"

#include <algorithm>
#include <utility>

#include <boost/asio/buffer.hpp>
#include <boost/asio/connect.hpp>
#include <boost/asio/error.hpp>
#include <boost/asio/write.hpp>

namespace tickmark::linkemu {
namespace {

namespace asio = boost::asio;
using asio::ip::tcp;

// A pipe stops reading while this much is queued, so a fast sender on a
// slow emulated link is held back by TCP flow control instead of filling
// memory. Large enough for bulk gRPC streams at tens of ms of delay.
constexpr size_t kMaxQueuedBytes = 4 * 1024 * 1024;

}  // namespace

TcpRelay::TcpRelay(tcp::socket client, DelaySampler* forward,
                   DelaySampler* backward, CounterSet* counters)
    : client_(std::move(client)),
      server_(client_.get_executor()),
      counters_(counters),
      forward_(Direction::kForward, &client_, &server_, forward,
               client_.get_executor()),
      backward_(Direction::kBackward, &server_, &client_, backward,
                client_.get_executor()) {}

void TcpRelay::Start(const tcp::endpoint& target) {
  server_.async_connect(target, [self = shared_from_this()](
                                    const boost::system::error_code& ec) {
    if (self->closed_) return;
    if (ec) {
      self->Close();
      return;
    }
    boost::system::error_code ignored;
    // Small chunks must not wait for Nagle: the emulated delay is the only
    // delay we want.
    self->client_.set_option(tcp::no_delay(true), ignored);
    self->server_.set_option(tcp::no_delay(true), ignored);
    self->counters_->Connection();
    self->ReadFrom(self->forward_);
    self->ReadFrom(self->backward_);
  });
}

void TcpRelay::Close() {
  if (closed_) return;
  closed_ = true;
  boost::system::error_code ignored;
  for (tcp::socket* s : {&client_, &server_}) {
    // Linger 0 turns close() into a reset, so the peer learns of the drop
    // at once rather than by a timeout.
    s->set_option(asio::socket_base::linger(true, 0), ignored);
    s->close(ignored);
  }
  forward_.timer.cancel();
  backward_.timer.cancel();
  forward_.queue.clear();
  backward_.queue.clear();
}

void TcpRelay::ReadFrom(Pipe& pipe) {
  if (pipe.queued_bytes >= kMaxQueuedBytes) {
    pipe.read_paused = true;
    return;
  }
  pipe.from->async_read_some(
      asio::buffer(pipe.buffer),
      [self = shared_from_this(), &pipe](const boost::system::error_code& ec,
                                         size_t n) {
        if (self->closed_) return;
        if (ec == asio::error::eof) {
          self->Enqueue(pipe, {}, /*eof=*/true);
          return;
        }
        if (ec) {
          self->Close();
          return;
        }
        self->counters_->Received(pipe.direction, n);
        self->Enqueue(pipe,
                      std::vector<char>(pipe.buffer.begin(),
                                        pipe.buffer.begin() + static_cast<ptrdiff_t>(n)),
                      /*eof=*/false);
        self->ReadFrom(pipe);
      });
}

void TcpRelay::Enqueue(Pipe& pipe, std::vector<char> bytes, bool eof) {
  const Clock::time_point due = std::max(
      pipe.last_due,
      Clock::now() + std::chrono::nanoseconds(pipe.sampler->NextDelay().nanos()));
  pipe.last_due = due;
  pipe.queued_bytes += bytes.size();
  pipe.queue.push_back(Chunk{due, std::move(bytes), eof});
  if (!pipe.writing) WriteNext(pipe);
}

void TcpRelay::WriteNext(Pipe& pipe) {
  if (pipe.queue.empty()) {
    pipe.writing = false;
    return;
  }
  pipe.writing = true;
  pipe.timer.expires_at(pipe.queue.front().due);
  pipe.timer.async_wait([self = shared_from_this(),
                         &pipe](const boost::system::error_code& ec) {
    if (self->closed_ || ec) return;
    Chunk& chunk = pipe.queue.front();
    if (chunk.eof) {
      boost::system::error_code ignored;
      pipe.to->shutdown(tcp::socket::shutdown_send, ignored);
      pipe.queue.pop_front();
      pipe.writing = false;
      return;  // nothing can follow an EOF
    }
    asio::async_write(
        *pipe.to, asio::buffer(chunk.bytes),
        [self, &pipe](const boost::system::error_code& write_ec, size_t n) {
          if (self->closed_) return;
          if (write_ec) {
            self->Close();
            return;
          }
          self->counters_->Delivered(pipe.direction, n);
          pipe.queued_bytes -= n;
          pipe.queue.pop_front();
          if (pipe.read_paused) {
            pipe.read_paused = false;
            self->ReadFrom(pipe);
          }
          self->WriteNext(pipe);
        });
  });
}

}  // namespace tickmark::linkemu

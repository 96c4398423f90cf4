// One relayed TCP connection: the accepted client socket, the socket to the
// target, and the two one-way byte pipes between them.
//
// Each chunk read is written out at
//   due = max(due of the previous chunk, read time + one delay sample),
// so bytes keep their order (a TCP stream cannot reorder) while the jitter
// still stretches and squeezes the gaps. A peer's EOF travels the same way,
// as an empty chunk, and becomes a shutdown(send) on the other side. Any
// error, or Close(), ends both sides at once with a reset.
//
// A relay owns its sockets; pending handlers hold a shared_ptr to it, so it
// lives until the last of them ran. Not thread-safe: everything, Close()
// included, runs on the proxy's I/O thread.
#ifndef TICKMARK_TOOLS_LINKEMU_TCP_RELAY_H_
#define TICKMARK_TOOLS_LINKEMU_TCP_RELAY_H_

#include <array>
#include <chrono>
#include <cstddef>
#include <deque>
#include <memory>
#include <vector>

#include <boost/asio/ip/tcp.hpp>
#include <boost/asio/steady_timer.hpp>

#include "tools/linkemu/delay_sampler.h"
#include "tools/linkemu/link_counters.h"

namespace tickmark::linkemu {

class TcpRelay : public std::enable_shared_from_this<TcpRelay> {
 public:
  // `client` is the accepted socket. The samplers and counters belong to the
  // proxy and outlive every relay (the proxy joins its I/O thread first).
  TcpRelay(boost::asio::ip::tcp::socket client, DelaySampler* forward,
           DelaySampler* backward, CounterSet* counters);
  TcpRelay(const TcpRelay&) = delete;
  TcpRelay& operator=(const TcpRelay&) = delete;

  // Connects to `target`, then relays both ways until both sides have closed
  // or anything fails.
  void Start(const boost::asio::ip::tcp::endpoint& target);

  // Resets both connections now; queued bytes are discarded. Idempotent.
  void Close();

 private:
  using Clock = std::chrono::steady_clock;

  // Bytes read from one side, waiting for their delivery time.
  struct Chunk {
    Clock::time_point due;    // not before this instant
    std::vector<char> bytes;  // empty for the EOF marker
    bool eof = false;         // the sender shut down its side
  };

  // One direction of the relay.
  struct Pipe {
    Pipe(Direction d, boost::asio::ip::tcp::socket* src,
         boost::asio::ip::tcp::socket* dst, DelaySampler* s,
         const boost::asio::any_io_executor& executor)
        : direction(d), from(src), to(dst), sampler(s), timer(executor) {}

    Direction direction;                  // for the counters
    boost::asio::ip::tcp::socket* from;   // read side (a member of the relay)
    boost::asio::ip::tcp::socket* to;     // write side (a member of the relay)
    DelaySampler* sampler;                // this direction's delays
    boost::asio::steady_timer timer;      // waits for the front chunk's due time
    std::array<char, 64 * 1024> buffer;   // target of the pending read
    std::deque<Chunk> queue;              // read, not yet written, in order
    size_t queued_bytes = 0;              // sum of queue sizes, for backpressure
    Clock::time_point last_due;           // due time of the newest chunk
    bool writing = false;                 // a timer wait or write is pending
    bool read_paused = false;             // reading stopped: queue is full
  };

  void ReadFrom(Pipe& pipe);
  void Enqueue(Pipe& pipe, std::vector<char> bytes, bool eof);
  void WriteNext(Pipe& pipe);

  boost::asio::ip::tcp::socket client_;  // accepted from the client
  boost::asio::ip::tcp::socket server_;  // connected to the target
  CounterSet* counters_;                 // the proxy's; not owned
  Pipe forward_;                         // client_ → server_
  Pipe backward_;                        // server_ → client_
  bool closed_ = false;                  // Close() ran; handlers stop at once
};

}  // namespace tickmark::linkemu

#endif  // TICKMARK_TOOLS_LINKEMU_TCP_RELAY_H_

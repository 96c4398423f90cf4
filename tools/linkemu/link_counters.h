// Traffic counters of one proxy. LinkCounters is a plain snapshot;
// CounterSet is the live, lock-free set a proxy updates from its I/O thread
// while any thread takes snapshots. A snapshot is not atomic across fields
// (each field is read on its own), which is fine for reporting and for tests
// that wait until a field reaches a value.
#ifndef TICKMARK_TOOLS_LINKEMU_LINK_COUNTERS_H_
#define TICKMARK_TOOLS_LINKEMU_LINK_COUNTERS_H_

#include <atomic>
#include <cstdint>

#include "tools/linkemu/delay_sampler.h"

namespace tickmark::linkemu {

// One direction's traffic. A chunk is one read from the sending socket: a
// datagram for UDP, whatever one read returned for TCP.
struct DirectionCounters {
  uint64_t received_chunks = 0;   // read from the sender
  uint64_t received_bytes = 0;    // payload bytes read from the sender
  uint64_t delivered_chunks = 0;  // written to the receiver
  uint64_t delivered_bytes = 0;   // payload bytes written to the receiver
  uint64_t dropped_chunks = 0;    // lost on purpose (loss, blackhole) or on a send error
};

struct LinkCounters {
  DirectionCounters forward;   // client→server
  DirectionCounters backward;  // server→client
  uint64_t connections = 0;  // TCP connections accepted and relayed; UDP flows opened
  uint64_t refused = 0;      // TCP connections reset because of the blackhole
};

class CounterSet {
 public:
  // Adds one chunk of `bytes` read in `direction`.
  void Received(Direction direction, uint64_t bytes) {
    Side& s = side(direction);
    s.received_chunks.fetch_add(1, std::memory_order_relaxed);
    s.received_bytes.fetch_add(bytes, std::memory_order_relaxed);
  }
  // Adds one chunk of `bytes` written in `direction`.
  void Delivered(Direction direction, uint64_t bytes) {
    Side& s = side(direction);
    s.delivered_chunks.fetch_add(1, std::memory_order_relaxed);
    s.delivered_bytes.fetch_add(bytes, std::memory_order_relaxed);
  }
  // Adds one chunk dropped in `direction`.
  void Dropped(Direction direction) {
    side(direction).dropped_chunks.fetch_add(1, std::memory_order_relaxed);
  }
  void Connection() { connections_.fetch_add(1, std::memory_order_relaxed); }
  void Refused() { refused_.fetch_add(1, std::memory_order_relaxed); }

  // Thread-safe.
  LinkCounters Snapshot() const {
    LinkCounters c;
    c.forward = Read(forward_);
    c.backward = Read(backward_);
    c.connections = connections_.load(std::memory_order_relaxed);
    c.refused = refused_.load(std::memory_order_relaxed);
    return c;
  }

 private:
  struct Side {
    std::atomic<uint64_t> received_chunks{0};   // see DirectionCounters
    std::atomic<uint64_t> received_bytes{0};    // see DirectionCounters
    std::atomic<uint64_t> delivered_chunks{0};  // see DirectionCounters
    std::atomic<uint64_t> delivered_bytes{0};   // see DirectionCounters
    std::atomic<uint64_t> dropped_chunks{0};    // see DirectionCounters
  };

  static DirectionCounters Read(const Side& s) {
    DirectionCounters d;
    d.received_chunks = s.received_chunks.load(std::memory_order_relaxed);
    d.received_bytes = s.received_bytes.load(std::memory_order_relaxed);
    d.delivered_chunks = s.delivered_chunks.load(std::memory_order_relaxed);
    d.delivered_bytes = s.delivered_bytes.load(std::memory_order_relaxed);
    d.dropped_chunks = s.dropped_chunks.load(std::memory_order_relaxed);
    return d;
  }

  Side& side(Direction d) { return d == Direction::kForward ? forward_ : backward_; }

  Side forward_;                          // client→server
  Side backward_;                         // server→client
  std::atomic<uint64_t> connections_{0};  // see LinkCounters
  std::atomic<uint64_t> refused_{0};      // see LinkCounters
};

}  // namespace tickmark::linkemu

#endif  // TICKMARK_TOOLS_LINKEMU_LINK_COUNTERS_H_

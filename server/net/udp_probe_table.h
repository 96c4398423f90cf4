// UdpProbeTable: the server's half of the UDP probe exchange
// (probe_datagram.h), without I/O. It knows the streams that may probe
// (tag → key, session clock, sample callback), answers requests with
// challenges, turns answers into ProbeTimestamps for the stream's clock
// model, and drops and counts everything else: malformed datagrams, unknown
// tags, bad MACs, and replays (a request whose id is not above the stream's
// last, an answer to no outstanding challenge or with a changed T1).
//
// Thread safety: thread-safe. Callbacks (now, on_sample) are called without
// the table's lock held, so they may call Add/Remove.
#ifndef TICKMARK_SERVER_NET_UDP_PROBE_TABLE_H_
#define TICKMARK_SERVER_NET_UDP_PROBE_TABLE_H_

#include <cstdint>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <string>
#include <string_view>

#include "server/core/clock_model.h"

namespace tickmark::net {

// One stream that may probe over UDP.
struct UdpProbeStream {
  std::string key;  // kProbeKeyBytes secret bytes
  // The stream's session clock; stamps T1 and T4.
  std::function<SessionTime()> now;
  // An answered probe: its client id and all four timestamps.
  std::function<void(uint64_t id, const ProbeTimestamps&)> on_sample;
};

struct UdpProbeCounters {
  uint64_t received = 0;    // datagrams handled
  uint64_t challenged = 0;  // requests answered with a challenge
  uint64_t samples = 0;     // answers passed to a stream
  uint64_t malformed = 0;
  uint64_t unknown_tag = 0;
  uint64_t bad_mac = 0;
  uint64_t replayed = 0;    // stale or repeated ids, answers to no challenge
  uint64_t wrong_kind = 0;  // a challenge sent to the server
};

class UdpProbeTable {
 public:
  // Challenges remembered per stream for matching answers.
  static constexpr size_t kRememberedChallenges = 16;
  // A challenge unanswered this long (session time since its T1) counts as
  // lost in DropsOf (the stream probes' timeout, LiveService::Options).
  static constexpr Duration kAnswerWithin = Duration::Seconds(2);

  // Adds (or replaces) the stream with this tag.
  void Add(uint64_t tag, UdpProbeStream stream);
  void Remove(uint64_t tag);

  // Handles one received datagram. Returns the datagram to send back to its
  // sender (a challenge), or an empty string. T1 is stamped here, so the
  // caller should send the reply at once.
  std::string Handle(std::string_view datagram);

  UdpProbeCounters counters() const;

  // One stream's lost or refused probes, for operators (session show):
  // challenges that got no answer within kAnswerWithin (or were pushed out
  // of the remembered ones unanswered), and its datagrams dropped as replays
  // or for a bad MAC. 0 for an unknown tag.
  uint64_t DropsOf(uint64_t tag) const;

 private:
  struct Entry {
    std::shared_ptr<const UdpProbeStream> stream;
    uint64_t last_request_id = 0;
    std::map<uint64_t, int64_t> challenges;  // id -> T1 (session ns)
    uint64_t dropped = 0;                    // replays, bad MACs, challenges forgotten unanswered
  };

  mutable std::mutex mu_;
  std::map<uint64_t, Entry> streams_;  // by tag; GUARDED_BY(mu_)
  UdpProbeCounters counters_;          // GUARDED_BY(mu_)
};

}  // namespace tickmark::net

#endif  // TICKMARK_SERVER_NET_UDP_PROBE_TABLE_H_

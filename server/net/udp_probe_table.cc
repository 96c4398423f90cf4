#include "server/net/udp_probe_table.h"

#include <utility>

#include "server/net/probe_datagram.h"

namespace tickmark::net {

void UdpProbeTable::Add(uint64_t tag, UdpProbeStream stream) {
  std::lock_guard<std::mutex> lock(mu_);
  Entry& e = streams_[tag];
  e = Entry{};
  e.stream = std::make_shared<const UdpProbeStream>(std::move(stream));
}

void UdpProbeTable::Remove(uint64_t tag) {
  std::lock_guard<std::mutex> lock(mu_);
  streams_.erase(tag);
}

UdpProbeCounters UdpProbeTable::counters() const {
  std::lock_guard<std::mutex> lock(mu_);
  return counters_;
}

uint64_t UdpProbeTable::DropsOf(uint64_t tag) const {
  std::shared_ptr<const UdpProbeStream> stream;
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto it = streams_.find(tag);
    if (it == streams_.end()) return 0;
    stream = it->second.stream;
  }
  const int64_t now = stream->now().nanos();  // without the lock (see the header)
  std::lock_guard<std::mutex> lock(mu_);
  auto it = streams_.find(tag);
  if (it == streams_.end() || it->second.stream != stream) return 0;
  uint64_t n = it->second.dropped;
  for (const auto& [id, t1] : it->second.challenges) {
    if (now - t1 > kAnswerWithin.nanos()) ++n;
  }
  return n;
}

std::string UdpProbeTable::Handle(std::string_view datagram) {
  std::shared_ptr<const UdpProbeStream> stream;
  {
    std::lock_guard<std::mutex> lock(mu_);
    ++counters_.received;
    const std::optional<uint64_t> tag = PeekProbeTag(datagram);
    if (!tag) {
      ++counters_.malformed;
      return {};
    }
    auto it = streams_.find(*tag);
    if (it == streams_.end()) {
      ++counters_.unknown_tag;
      return {};
    }
    stream = it->second.stream;
  }
  // An answer's T4: as close to its arrival as the lookup allows.
  const SessionTime arrival = stream->now();
  ProbeDatagram d;
  if (DecodeProbeDatagram(datagram, stream->key, &d) != ProbeDecodeResult::kOk) {
    std::lock_guard<std::mutex> lock(mu_);
    ++counters_.bad_mac;
    if (auto it = streams_.find(*PeekProbeTag(datagram)); it != streams_.end()) {
      ++it->second.dropped;
    }
    return {};
  }

  if (d.kind == ProbeDatagramKind::kRequest) {
    ProbeDatagram challenge;
    challenge.kind = ProbeDatagramKind::kChallenge;
    challenge.tag = d.tag;
    challenge.id = d.id;
    std::lock_guard<std::mutex> lock(mu_);
    auto it = streams_.find(d.tag);
    // Removed meanwhile, or replaced by a stream with another key.
    if (it == streams_.end() || it->second.stream != stream) {
      ++counters_.unknown_tag;
      return {};
    }
    Entry& e = it->second;
    if (d.id <= e.last_request_id) {
      ++counters_.replayed;
      ++e.dropped;
      return {};
    }
    e.last_request_id = d.id;
    // T1 as late as possible: the caller sends the challenge at once.
    challenge.t1_session_ns = stream->now().nanos();
    e.challenges[d.id] = challenge.t1_session_ns;
    while (e.challenges.size() > kRememberedChallenges) {  // forgotten unanswered: lost
      e.challenges.erase(e.challenges.begin());
      ++e.dropped;
    }
    ++counters_.challenged;
    return EncodeProbeDatagram(challenge, stream->key);
  }

  if (d.kind != ProbeDatagramKind::kAnswer) {
    std::lock_guard<std::mutex> lock(mu_);
    ++counters_.wrong_kind;
    return {};
  }
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto it = streams_.find(d.tag);
    if (it == streams_.end() || it->second.stream != stream) {
      ++counters_.unknown_tag;
      return {};
    }
    Entry& e = it->second;
    auto c = e.challenges.find(d.id);
    // Each challenge is answered once, with the T1 it carried.
    if (c == e.challenges.end() || c->second != d.t1_session_ns) {
      ++counters_.replayed;
      ++e.dropped;
      return {};
    }
    e.challenges.erase(c);
    ++counters_.samples;
  }
  stream->on_sample(d.id, ProbeTimestamps{SessionTime::FromNanos(d.t1_session_ns),
                                          ClientTime::FromNanos(d.t2_client_ns),
                                          ClientTime::FromNanos(d.t3_client_ns), arrival});
  return {};
}

}  // namespace tickmark::net

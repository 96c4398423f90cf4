// Caps on open live streams, in total and per peer host, so that a client
// opening streams in a loop cannot exhaust the server (RESOURCE_EXHAUSTED
// past a cap).
//
// Thread safety: thread-safe.
#ifndef TICKMARK_SERVER_RPC_STREAM_ADMISSION_H_
#define TICKMARK_SERVER_RPC_STREAM_ADMISSION_H_

#include <map>
#include <mutex>
#include <string>
#include <string_view>

#include "absl/status/status.h"

namespace tickmark::rpc {

class StreamAdmission {
 public:
  // 0: no cap.
  StreamAdmission(size_t max_streams, size_t max_per_peer)
      : max_streams_(max_streams), max_per_peer_(max_per_peer) {}

  // Counts a stream from `peer_host` in, or says which cap it hits. Every OK
  // must be matched by one Release with the same host.
  absl::Status Admit(const std::string& peer_host);
  void Release(const std::string& peer_host);
  size_t open() const;

 private:
  const size_t max_streams_;
  const size_t max_per_peer_;
  mutable std::mutex mu_;
  size_t total_ = 0;                        // GUARDED_BY(mu_)
  std::map<std::string, size_t> per_peer_;  // GUARDED_BY(mu_)
};

// The host part of a gRPC peer string ("ipv4:127.0.0.1:5000" -> "127.0.0.1",
// "ipv6:[::1]:5000" -> "::1"); other forms are returned whole.
std::string PeerHost(std::string_view peer);

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_STREAM_ADMISSION_H_

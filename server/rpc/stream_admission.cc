#include "server/rpc/stream_admission.h"

#include "server/base/strings.h"

namespace tickmark::rpc {

absl::Status StreamAdmission::Admit(const std::string& peer_host) {
  std::lock_guard<std::mutex> lock(mu_);
  if (max_streams_ != 0 && total_ >= max_streams_) {
    return absl::ResourceExhaustedError(
        Cat("the server has its maximum of ", max_streams_, " open streams; try again later"));
  }
  size_t& mine = per_peer_[peer_host];
  if (max_per_peer_ != 0 && mine >= max_per_peer_) {
    if (mine == 0) per_peer_.erase(peer_host);
    return absl::ResourceExhaustedError(
        Cat("at most ", max_per_peer_, " open streams per client host (", peer_host, ")"));
  }
  ++mine;
  ++total_;
  return absl::OkStatus();
}

void StreamAdmission::Release(const std::string& peer_host) {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = per_peer_.find(peer_host);
  if (it == per_peer_.end()) return;
  if (--it->second == 0) per_peer_.erase(it);
  if (total_ > 0) --total_;
}

size_t StreamAdmission::open() const {
  std::lock_guard<std::mutex> lock(mu_);
  return total_;
}

std::string PeerHost(std::string_view peer) {
  for (std::string_view prefix : {"ipv4:", "ipv6:"}) {
    if (peer.substr(0, prefix.size()) == prefix) {
      std::string_view rest = peer.substr(prefix.size());
      if (!rest.empty() && rest.front() == '[') {
        const size_t close = rest.find(']');
        if (close != std::string_view::npos) return std::string(rest.substr(1, close - 1));
      }
      if (rest.substr(0, 3) == "%5B") {  // newer gRPC percent-encodes the brackets
        const size_t close = rest.find("%5D");
        if (close != std::string_view::npos) return std::string(rest.substr(3, close - 3));
      }
      const size_t colon = rest.rfind(':');
      return std::string(colon == std::string_view::npos ? rest : rest.substr(0, colon));
    }
  }
  return std::string(peer);
}

}  // namespace tickmark::rpc

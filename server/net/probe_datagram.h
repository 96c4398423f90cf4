// The UDP probe port's datagrams: encoding, decoding and authentication.
// Pure functions, no I/O; shared by the server (udp_probe_server.h) and the
// client (clients/common/stream_client.cc), tested by feeding bytes.
//
// A client-initiated probe is three datagrams, so that the server ends up
// holding all four timestamps in the roles of server/core/clock_model.h
// (T1 and T4 on session time, T2 and T3 on the client clock):
//   1. request    client → server  (tag, id)
//   2. challenge  server → client  (tag, id, T1 stamped as it is sent)
//   3. answer     client → server  (tag, id, T1, T2 at receipt, T3 at send)
// and the server stamps T4 when the answer arrives.
//
// Layout (integers big-endian, fixed sizes per kind):
//   0  magic "TMU1"      4  kind (1 byte)   5  three zero bytes
//   8  tag (u64)        16  id (u64)
//   24 t1 (i64)  [challenge, answer]
//   32 t2, 40 t3 (i64)  [answer]
//   then HMAC-SHA256(key, all bytes before it), 32 bytes.
// The key is per stream and known only to the server and the client (it is
// sent in the Welcome over TLS or loopback), so a datagram that verifies
// came from one of them. The kind is covered by the MAC, so a challenge
// cannot be reflected back as a request or an answer.
//
// Thread safety: all functions are thread-safe.
#ifndef TICKMARK_SERVER_NET_PROBE_DATAGRAM_H_
#define TICKMARK_SERVER_NET_PROBE_DATAGRAM_H_

#include <cstddef>
#include <cstdint>
#include <optional>
#include <string>
#include <string_view>

namespace tickmark::net {

enum class ProbeDatagramKind : uint8_t {
  kRequest = 1,
  kChallenge = 2,
  kAnswer = 3,
};

struct ProbeDatagram {
  ProbeDatagramKind kind = ProbeDatagramKind::kRequest;
  uint64_t tag = 0;           // names the stream (Welcome.udp_probe_tag)
  uint64_t id = 0;            // chosen by the client, increasing per stream
  int64_t t1_session_ns = 0;  // challenge and answer
  int64_t t2_client_ns = 0;   // answer
  int64_t t3_client_ns = 0;   // answer

  bool operator==(const ProbeDatagram&) const = default;
};

// Keys are exactly this long (HMAC-SHA256's block of entropy).
inline constexpr size_t kProbeKeyBytes = 32;
inline constexpr size_t kProbeMacBytes = 32;
// The largest datagram of the protocol (an answer).
inline constexpr size_t kMaxProbeDatagramBytes = 48 + kProbeMacBytes;

// Encodes and signs `d` with `key` (kProbeKeyBytes bytes).
std::string EncodeProbeDatagram(const ProbeDatagram& d, std::string_view key);

// The tag of a well-formed datagram (magic, kind and size check out), before
// its MAC is checked: the receiver needs it to find the key.
std::optional<uint64_t> PeekProbeTag(std::string_view bytes);

enum class ProbeDecodeResult {
  kOk,
  kMalformed,  // wrong magic, kind, size or reserved bytes
  kBadMac,     // well-formed but not signed with this key
};

// Checks and decodes one datagram. *out is set only on kOk. The MAC is
// compared in constant time.
ProbeDecodeResult DecodeProbeDatagram(std::string_view bytes, std::string_view key,
                                      ProbeDatagram* out);

}  // namespace tickmark::net

#endif  // TICKMARK_SERVER_NET_PROBE_DATAGRAM_H_

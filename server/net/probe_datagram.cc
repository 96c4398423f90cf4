#include "server/net/probe_datagram.h"

#include <openssl/crypto.h>
#include <openssl/evp.h>
#include <openssl/hmac.h>

#include <array>

namespace tickmark::net {
namespace {

constexpr char kMagic[4] = {'T', 'M', 'U', '1'};
constexpr size_t kHeaderBytes = 24;  // magic, kind, reserved, tag, id

size_t BodyBytes(ProbeDatagramKind kind) {
  switch (kind) {
    case ProbeDatagramKind::kRequest:
      return kHeaderBytes;
    case ProbeDatagramKind::kChallenge:
      return kHeaderBytes + 8;
    case ProbeDatagramKind::kAnswer:
      return kHeaderBytes + 24;
  }
  return 0;
}

void PutU64(std::string* out, uint64_t v) {
  for (int shift = 56; shift >= 0; shift -= 8) {
    out->push_back(static_cast<char>((v >> shift) & 0xff));
  }
}

uint64_t GetU64(std::string_view b, size_t at) {
  uint64_t v = 0;
  for (size_t i = 0; i < 8; ++i) v = (v << 8) | static_cast<uint8_t>(b[at + i]);
  return v;
}

std::array<unsigned char, kProbeMacBytes> Mac(std::string_view key, std::string_view body) {
  std::array<unsigned char, kProbeMacBytes> mac{};
  unsigned int len = 0;
  HMAC(EVP_sha256(), key.data(), static_cast<int>(key.size()),
       reinterpret_cast<const unsigned char*>(body.data()), body.size(), mac.data(), &len);
  return mac;
}

// The kind named by a well-formed datagram's header, if any.
std::optional<ProbeDatagramKind> WellFormedKind(std::string_view b) {
  if (b.size() < kHeaderBytes + kProbeMacBytes) return std::nullopt;
  if (b.substr(0, 4) != std::string_view(kMagic, 4)) return std::nullopt;
  if (b[5] != 0 || b[6] != 0 || b[7] != 0) return std::nullopt;
  const auto kind = static_cast<ProbeDatagramKind>(static_cast<uint8_t>(b[4]));
  if (kind != ProbeDatagramKind::kRequest && kind != ProbeDatagramKind::kChallenge &&
      kind != ProbeDatagramKind::kAnswer) {
    return std::nullopt;
  }
  if (b.size() != BodyBytes(kind) + kProbeMacBytes) return std::nullopt;
  return kind;
}

}  // namespace

std::string EncodeProbeDatagram(const ProbeDatagram& d, std::string_view key) {
  std::string out(kMagic, 4);
  out.push_back(static_cast<char>(d.kind));
  out.append(3, '\0');
  PutU64(&out, d.tag);
  PutU64(&out, d.id);
  if (d.kind != ProbeDatagramKind::kRequest) PutU64(&out, static_cast<uint64_t>(d.t1_session_ns));
  if (d.kind == ProbeDatagramKind::kAnswer) {
    PutU64(&out, static_cast<uint64_t>(d.t2_client_ns));
    PutU64(&out, static_cast<uint64_t>(d.t3_client_ns));
  }
  const auto mac = Mac(key, out);
  out.append(reinterpret_cast<const char*>(mac.data()), mac.size());
  return out;
}

std::optional<uint64_t> PeekProbeTag(std::string_view bytes) {
  if (!WellFormedKind(bytes)) return std::nullopt;
  return GetU64(bytes, 8);
}

ProbeDecodeResult DecodeProbeDatagram(std::string_view bytes, std::string_view key,
                                      ProbeDatagram* out) {
  const std::optional<ProbeDatagramKind> kind = WellFormedKind(bytes);
  if (!kind) return ProbeDecodeResult::kMalformed;
  const size_t body = BodyBytes(*kind);
  const auto mac = Mac(key, bytes.substr(0, body));
  if (CRYPTO_memcmp(mac.data(), bytes.data() + body, kProbeMacBytes) != 0) {
    return ProbeDecodeResult::kBadMac;
  }
  ProbeDatagram d;
  d.kind = *kind;
  d.tag = GetU64(bytes, 8);
  d.id = GetU64(bytes, 16);
  if (*kind != ProbeDatagramKind::kRequest)
    d.t1_session_ns = static_cast<int64_t>(GetU64(bytes, 24));
  if (*kind == ProbeDatagramKind::kAnswer) {
    d.t2_client_ns = static_cast<int64_t>(GetU64(bytes, 32));
    d.t3_client_ns = static_cast<int64_t>(GetU64(bytes, 40));
  }
  *out = d;
  return ProbeDecodeResult::kOk;
}

}  // namespace tickmark::net

#include "server/web/join_codes.h"

#include <openssl/rand.h>

#include <array>

#include "server/base/sha256.h"
#include "server/base/strings.h"

namespace tickmark::web {
namespace {

// Crockford's base32 alphabet (no I, L, O, U).
constexpr char kAlphabet[] = "0123456789ABCDEFGHJKMNPQRSTVWXYZ";
constexpr size_t kCodeChars = 16;  // 80 bits

// The key codes_ is indexed by: SHA-256 of the canonical code, 32 raw
// bytes; empty if hashing fails.
std::string KeyOf(const std::string& canonical) {
  auto key = Sha256(canonical);
  return key.ok() ? *key : std::string();
}

}  // namespace

JoinCodeStore::JoinCodeStore(const MonotonicSource* clock, Options options)
    : clock_(clock),
      options_(options),
      total_(options.total_rate_per_s, options.total_burst, clock) {}

std::string JoinCodeStore::Normalize(std::string_view code) {
  std::string out;
  for (char c : code) {
    if (c == '-' || c == ' ') continue;
    if (c >= 'a' && c <= 'z') c = static_cast<char>(c - 'a' + 'A');
    if (c == 'O') c = '0';
    if (c == 'I' || c == 'L') c = '1';
    bool known = false;
    for (const char* a = kAlphabet; *a != '\0'; ++a) known = known || *a == c;
    if (!known || out.size() == kCodeChars) return "";
    out.push_back(c);
  }
  return out.size() == kCodeChars ? out : "";
}

std::string JoinCodeStore::Display(std::string_view canonical) {
  std::string out;
  for (size_t i = 0; i < canonical.size(); ++i) {
    if (i > 0 && i % 4 == 0) out.push_back('-');
    out.push_back(canonical[i]);
  }
  return out;
}

absl::StatusOr<std::string> JoinCodeStore::Create(Invite invite, Duration ttl) {
  if (ttl <= Duration::Zero() || ttl > options_.max_ttl) {
    return absl::InvalidArgumentError(Cat("an invite lasts more than 0 s and at most ",
                                          options_.max_ttl.nanos() / 1'000'000'000, " s"));
  }
  // 10 random bytes give exactly 16 base32 characters.
  std::array<unsigned char, 10> bytes{};
  if (RAND_bytes(bytes.data(), static_cast<int>(bytes.size())) != 1) {
    return absl::UnavailableError("the random source failed; no join code made");
  }
  std::string code;
  uint32_t acc = 0;
  int bits = 0;
  for (unsigned char b : bytes) {
    acc = (acc << 8) | b;
    bits += 8;
    while (bits >= 5) {
      code.push_back(kAlphabet[(acc >> (bits - 5)) & 31]);
      bits -= 5;
    }
  }
  const std::string key = KeyOf(code);
  if (key.empty()) return absl::InternalError("SHA-256 failed; no join code made");
  const int64_t now = clock_->NowNanos();
  std::lock_guard<std::mutex> lock(mu_);
  Prune(now);
  if (live_codes_locked(now) >= options_.max_live_codes) {
    return absl::ResourceExhaustedError(Cat("too many open invites (", options_.max_live_codes,
                                            "); wait for some to be used or to expire"));
  }
  codes_[key] = Entry{std::move(invite), now + ttl.nanos(), false};
  return Display(code);
}

absl::StatusOr<Invite> JoinCodeStore::Redeem(std::string_view code, const std::string& peer) {
  const int64_t now = clock_->NowNanos();
  std::lock_guard<std::mutex> lock(mu_);
  Prune(now);
  if (!TakeAttempt(peer, now)) {
    return absl::ResourceExhaustedError(
        "too many join attempts; wait a minute, then open the link again");
  }
  const std::string canonical = Normalize(code);
  if (canonical.empty()) {
    return absl::InvalidArgumentError(
        "this is not a join code (16 letters and digits, e.g. 7KQ2-M9XD-4RTB-Z1HE); check the "
        "link");
  }
  auto it = codes_.find(KeyOf(canonical));
  if (it == codes_.end()) {
    return absl::NotFoundError(
        "this join code is not valid: check the link, or ask for a new one (codes are also "
        "forgotten when the server restarts)");
  }
  Entry& e = it->second;
  if (e.used) {
    return absl::FailedPreconditionError(
        "this join link was used already (each link works once): ask for a new one");
  }
  if (now >= e.expires_ns) {
    return absl::DeadlineExceededError("this join link has expired: ask for a new one");
  }
  e.used = true;
  return e.invite;
}

void JoinCodeStore::Release(std::string_view code) {
  const std::string canonical = Normalize(code);
  if (canonical.empty()) return;
  std::lock_guard<std::mutex> lock(mu_);
  auto it = codes_.find(KeyOf(canonical));
  if (it != codes_.end()) it->second.used = false;
}

size_t JoinCodeStore::live_codes() const {
  std::lock_guard<std::mutex> lock(mu_);
  return live_codes_locked(clock_->NowNanos());
}

size_t JoinCodeStore::live_codes_locked(int64_t now_ns) const {
  size_t n = 0;
  for (const auto& [key, e] : codes_) n += (!e.used && now_ns < e.expires_ns) ? 1 : 0;
  return n;
}

void JoinCodeStore::Prune(int64_t now_ns) {
  // At most once a second: the maps are small, but Redeem may be hammered.
  if (now_ns - last_prune_ns_ < 1'000'000'000 && last_prune_ns_ != 0) return;
  last_prune_ns_ = now_ns;
  for (auto it = codes_.begin(); it != codes_.end();) {
    it = now_ns >= it->second.expires_ns + options_.remember.nanos() ? codes_.erase(it)
                                                                     : std::next(it);
  }
  // A bucket idle long enough to have refilled is the same as a new one.
  const double refill_s =
      options_.peer_rate_per_s > 0 ? options_.peer_burst / options_.peer_rate_per_s : 0;
  const int64_t idle_ns = static_cast<int64_t>(refill_s * 1e9) + 1'000'000'000;
  for (auto it = peers_.begin(); it != peers_.end();) {
    it = now_ns - it->second.last_ns > idle_ns ? peers_.erase(it) : std::next(it);
  }
}

bool JoinCodeStore::TakeAttempt(const std::string& peer, int64_t now_ns) {
  PeerBucket& p = peers_[peer];
  if (!p.bucket) {
    p.bucket =
        std::make_unique<rpc::TokenBucket>(options_.peer_rate_per_s, options_.peer_burst, clock_);
  }
  p.last_ns = now_ns;
  // Both buckets are charged only when the peer's allows: one address
  // hammering cannot use up everyone's share.
  return p.bucket->TryTake() && total_.TryTake();
}

}  // namespace tickmark::web

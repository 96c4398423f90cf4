// Join codes for the web page (docs/web.md, "Joining"). `tickmark invite`
// asks the server (SessionAdmin.CreateInvite) for a code; the page trades it
// once, before it expires, for a token of the invite's role.
//
// Kept in memory only, and only as SHA-256 hashes of the codes: a code that
// leaks from the server's memory or logs is useless, and a server restart
// forgets every code (invite again). That keeps join codes out of the ledger
// schema; a code is a way in, not a record of the session — the token it
// becomes is stored like any other (hashed, listed by `token list`).
//
// A code is 16 characters of Crockford's base32 (80 random bits), shown in
// groups of four ("7KQ2-M9XD-4RTB-Z1HE"); reading is forgiving (case,
// dashes and spaces ignored; O read as 0, I and L as 1). Redeeming is rate
// limited per client address and in total, failed attempts included, so
// guessing is hopeless twice over.
//
// Used and expired codes are remembered (as hashes) for a day after their
// expiry, so the page can say "used already" or "expired" rather than
// "unknown".
//
// Thread safety: thread-safe. Time comes from an injected MonotonicSource.
#ifndef TICKMARK_SERVER_WEB_JOIN_CODES_H_
#define TICKMARK_SERVER_WEB_JOIN_CODES_H_

#include <map>
#include <memory>
#include <mutex>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/statusor.h"
#include "server/core/time.h"
#include "server/rpc/token_bucket.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::web {

// What a code lets its holder become.
struct Invite {
  std::string session_id;
  tickmark::v1::Role role = tickmark::v1::ROLE_UNSPECIFIED;
  std::string subject;
  std::vector<double> graded_values;  // trainer page: extra graded buttons
};

class JoinCodeStore {
 public:
  struct Options {
    Duration max_ttl = Duration::Seconds(7 * 24 * 3600);
    // Codes not yet used and not expired, at most (past it Create refuses).
    size_t max_live_codes = 10'000;
    // How long a used or expired code is still recognised as such.
    Duration remember = Duration::Seconds(24 * 3600);
    // Redeem attempts per client address, and in total (token buckets).
    double peer_rate_per_s = 1.0 / 6;  // 10 a minute
    double peer_burst = 10;
    double total_rate_per_s = 2;
    double total_burst = 60;
  };

  JoinCodeStore(const MonotonicSource* clock, Options options);

  // Makes a code valid for `ttl` (0 < ttl <= max_ttl), returned in its
  // display form. RESOURCE_EXHAUSTED past max_live_codes; UNAVAILABLE if
  // the random source fails.
  absl::StatusOr<std::string> Create(Invite invite, Duration ttl);

  // Trades a code, once, for its invite. Errors, each with a message for
  // the person holding the link:
  //   RESOURCE_EXHAUSTED   too many attempts from `peer` (or in total)
  //   INVALID_ARGUMENT     not shaped like a code
  //   NOT_FOUND            unknown (mistyped, forged, or the server restarted)
  //   FAILED_PRECONDITION  used already
  //   DEADLINE_EXCEEDED    expired
  absl::StatusOr<Invite> Redeem(std::string_view code, const std::string& peer);

  // Makes a redeemed code usable again (the token it was traded for could
  // not be issued, e.g. the ledger failed); no effect on unknown codes.
  void Release(std::string_view code);

  // The canonical form of a code (16 characters, no dashes), or "" if it
  // is not shaped like one.
  static std::string Normalize(std::string_view code);
  // The display form: groups of four joined by '-'.
  static std::string Display(std::string_view canonical);

  size_t live_codes() const;

 private:
  struct Entry {
    Invite invite;
    int64_t expires_ns = 0;  // on clock_
    bool used = false;
  };
  struct PeerBucket {
    std::unique_ptr<rpc::TokenBucket> bucket;
    int64_t last_ns = 0;
  };
  // Drops entries past expiry + remember and idle peer buckets.
  void Prune(int64_t now_ns);                                 // REQUIRES(mu_)
  bool TakeAttempt(const std::string& peer, int64_t now_ns);  // REQUIRES(mu_)
  size_t live_codes_locked(int64_t now_ns) const;             // REQUIRES(mu_)

  const MonotonicSource* const clock_;  // not owned
  const Options options_;
  mutable std::mutex mu_;
  std::map<std::string, Entry> codes_;  // SHA-256 of the canonical code -> entry; GUARDED_BY(mu_)
  std::map<std::string, PeerBucket> peers_;  // GUARDED_BY(mu_)
  rpc::TokenBucket total_;
  int64_t last_prune_ns_ = 0;  // GUARDED_BY(mu_)
};

}  // namespace tickmark::web

#endif  // TICKMARK_SERVER_WEB_JOIN_CODES_H_

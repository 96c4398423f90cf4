// Client ids: the stable name a client gives itself in its Hello.
//
// The server deduplicates resent messages by (client_id, client_sequence), so
// a client id must stay the same across reconnects AND across restarts of the
// program (StreamClient then continues numbering above the server's
// Welcome.last_client_sequence). Two programs running at the same time must
// never share one id, or each would see the other's messages as duplicates.
// A default made from hostname + program + pid would break the first rule;
// DefaultClientId uses an installation id + program + source instead, so two
// instances of one user need distinct sources or an explicit --client-id.
// The installation id is random, made once per user and kept in the user's
// state folder: stable, and it names neither the person nor the machine (the
// id is stored in the ledger and in exports; a login name there would be
// personal data, docs/audit.md).
//
// Pure functions; thread-safe.
#ifndef TICKMARK_CLIENTS_COMMON_CLIENT_ID_H_
#define TICKMARK_CLIENTS_COMMON_CLIENT_ID_H_

#include <cstddef>
#include <string>
#include <string_view>

#include "absl/status/status.h"

namespace tickmark::client {

inline constexpr size_t kMaxClientIdLength = 64;

// OK if `id` is 1..64 characters of letters, digits, '-', '_', '.', ':'
// (stream.proto, Hello.client_id); INVALID_ARGUMENT naming the problem else.
absl::Status ValidateClientId(std::string_view id);

// Builds "host:user:program:source" (DefaultClientId passes the
// installation id as host and no user) from the parts, replacing characters
// outside the allowed set by '-'. If longer than 64 characters the result is
// cut and ends in '.' plus 8 hex digits of a hash of the full text, so it
// stays unique and stable. Empty parts are left out.
std::string MakeClientId(std::string_view host, std::string_view user,
                         std::string_view program, std::string_view source);

// The installation id kept in `state_dir` (file "installation-id", mode
// 0600, created with 12 random hex digits on first use, "i-" prefixed); ""
// if the folder cannot be made or read. Safe against two programs making it
// at once (the first file linked in place wins).
std::string InstallationId(const std::string& state_dir);

// The user's state folder for tickmark: $XDG_STATE_HOME/tickmark, else
// $HOME/.local/state/tickmark (XDG Base Directory Specification); "" if
// neither variable is set.
std::string StateDir();

// MakeClientId(installation id, "", program, source). Without a usable
// state folder: "h-" + 8 hex digits of a hash of hostname and uid instead
// (stable, and without the names themselves).
std::string DefaultClientId(std::string_view program, std::string_view source);

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_CLIENT_ID_H_

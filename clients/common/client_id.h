// Client ids: the stable name a client gives itself in its Hello.
//
// The server deduplicates resent messages by (client_id, client_sequence), so
// a client id must stay the same across reconnects AND across restarts of the
// program (StreamClient then continues numbering above the server's
// Welcome.last_client_sequence). Two programs running at the same time must
// never share one id, or each would see the other's messages as duplicates.
// A default made from hostname + program + pid would break the first rule;
// DefaultClientId uses hostname + user + program + source instead, so two
// instances on one host need distinct sources or an explicit --client-id.
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

// Builds "host:user:program:source" from the parts, replacing characters
// outside the allowed set by '-'. If longer than 64 characters the result is
// cut and ends in '.' plus 8 hex digits of a hash of the full text, so it
// stays unique and stable. Empty parts are left out.
std::string MakeClientId(std::string_view host, std::string_view user,
                         std::string_view program, std::string_view source);

// MakeClientId with this machine's hostname and the login user (from the
// uid, falling back to "uid<N>").
std::string DefaultClientId(std::string_view program, std::string_view source);

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_CLIENT_ID_H_

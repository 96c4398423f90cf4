// Reading the secret token a client presents in its Hello.
//
// A token must not travel on the command line by default: argv is visible to
// every user of the machine through ps and /proc. So the order is
//   1. --token-file PATH (trailing whitespace and newlines are trimmed);
//   2. --token VALUE, accepted but answered with a warning;
//   3. the environment variable TICKMARK_TOKEN.
// A token file readable by group or others also draws a warning.
//
// Thread-compatible (reads the environment; no other state).
#ifndef TICKMARK_CLIENTS_COMMON_TOKEN_H_
#define TICKMARK_CLIENTS_COMMON_TOKEN_H_

#include <string>
#include <vector>

#include "absl/status/statusor.h"

namespace tickmark::client {

inline constexpr char kTokenEnvVar[] = "TICKMARK_TOKEN";

struct TokenFlags {
  std::string token_file;  // --token-file; empty when not given
  std::string token;       // --token; empty when not given
};

struct Token {
  std::string value;
  std::string origin;                 // "file PATH", "--token", "TICKMARK_TOKEN"
  std::vector<std::string> warnings;  // for the user; empty when all is well
};

// NOT_FOUND when no source gives a token; INVALID_ARGUMENT for an empty or
// multi-line token; the OS error for an unreadable file.
absl::StatusOr<Token> ReadToken(const TokenFlags& flags);

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_TOKEN_H_

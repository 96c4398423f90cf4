// The connection flags every client program shares, defined once so they are
// spelled, defaulted and checked the same everywhere:
//
//   --server HOST:PORT   tickmarkd address (default $TICKMARK_SERVER, else
//                        127.0.0.1:7461)
//   --token-file PATH    file holding the token (else $TICKMARK_TOKEN)
//   --token TOKEN        accepted with a warning (argv is visible in ps)
//   --ca-file PATH       TLS, trusting the PEM roots in PATH
//   --insecure           plaintext to a non-loopback server
//   --client-id ID       stable id of this client (programs with a stream)
//   --no-realtime        send no CLOCK_REALTIME readings with events
//                        (programs with a stream; StreamOptions::send_realtime)
//
// They fill the structs channel.h and token.h already take. The flags go in
// the help group "Connection".
//
// Not thread-safe; use from main().
#ifndef TICKMARK_CLIENTS_COMMON_CONNECTION_FLAGS_H_
#define TICKMARK_CLIENTS_COMMON_CONNECTION_FLAGS_H_

#include <string>

#include <CLI/CLI.hpp>

#include "clients/common/channel.h"
#include "clients/common/token.h"

namespace tickmark::client {

inline constexpr char kDefaultServer[] = "127.0.0.1:7461";
inline constexpr char kServerEnvVar[] = "TICKMARK_SERVER";

struct ConnectionFlags {
  ChannelFlags channel;   // --server, --insecure, --ca-file
  TokenFlags token;       // --token-file, --token
  std::string client_id;  // --client-id; empty: the program's default
  bool no_realtime = false;  // --no-realtime: StreamOptions::send_realtime = false
};

// Which of the shared flags a program takes.
struct ConnectionFlagChoice {
  bool client_id = true;  // --client-id and --no-realtime; false without a stream (the CLI)
};

// Adds the shared flags to `app`, bound to `*flags` (which must outlive the
// parse). An empty channel.target is first set to $TICKMARK_SERVER or
// kDefaultServer. Values are checked while parsing: empty values, a bad
// --client-id, and --insecure with --ca-file are errors naming the flag.
// May be called for several apps with the same `flags` (the CLI's root and
// its commands, so the flags may stand before or after the command).
void AddConnectionFlags(CLI::App& app, ConnectionFlags* flags,
                        ConnectionFlagChoice choice = {});

// Adds --flush-timeout S (seconds a stream client waits for acknowledgements
// at exit; finite and >= 0), bound to `*seconds`, whose value is the default.
CLI::Option* AddFlushTimeoutFlag(CLI::App& app, double* seconds);

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_CONNECTION_FLAGS_H_

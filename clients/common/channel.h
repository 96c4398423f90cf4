// Choosing channel credentials for a server address (docs/architecture.md §7: TLS for
// gRPC; plaintext only on loopback or when explicitly asked for).
//
//   --ca-file PATH   TLS, trusting the PEM roots in PATH;
//   loopback target  plaintext (see MayUsePlaintext);
//   --insecure       plaintext to any host;
//   otherwise        TLS with the system's trusted roots.
//
// Pure functions apart from reading the CA file; thread-safe.
#ifndef TICKMARK_CLIENTS_COMMON_CHANNEL_H_
#define TICKMARK_CLIENTS_COMMON_CHANNEL_H_

#include <memory>
#include <string>
#include <string_view>

#include "absl/status/statusor.h"
#include "grpcpp/security/credentials.h"

namespace tickmark::client {

struct ChannelFlags {
  std::string target;   // "host:port", "[v6]:port", "dns:///host:port", "unix:path"
  bool insecure = false;
  std::string ca_file;  // empty: none given
};

// The host part of a gRPC target ("[::1]:7461" → "::1", "dns:///a:1" → "a");
// "unix:..." targets give "unix".
std::string TargetHost(std::string_view target);

// True when `target` can only be this machine: a unix socket, or a host that
// net::IsLoopbackHost (server/net/address.h) accepts — an IP literal in
// 127.0.0.0/8 or ::1, or "localhost". Other names ("127.example.org") are not.
bool MayUsePlaintext(std::string_view target);

struct ChannelChoice {
  std::shared_ptr<grpc::ChannelCredentials> credentials;
  bool tls = false;
};

// INVALID_ARGUMENT for --insecure together with --ca-file; the OS error when
// the CA file cannot be read.
absl::StatusOr<ChannelChoice> ChooseCredentials(const ChannelFlags& flags);

}  // namespace tickmark::client

#endif  // TICKMARK_CLIENTS_COMMON_CHANNEL_H_

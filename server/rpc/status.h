// absl::Status <-> grpc::Status, in one place (docs/conventions.md habit 2). The codes
// are the same numbers on both sides.
#ifndef TICKMARK_SERVER_RPC_STATUS_H_
#define TICKMARK_SERVER_RPC_STATUS_H_

#include <grpcpp/support/status.h>

#include <string>

#include "absl/status/status.h"

namespace tickmark::rpc {

// Several instances on one database (docs/architecture.md, "More than one
// machine"). A stream refused or ended UNAVAILABLE because another instance
// owns its session carries the owner's host:port in this trailing metadata
// key; clients reconnect there. Clients send the session id (once a Welcome
// told them) in kSessionMetadata, so that a load balancer can hash on it.
inline constexpr char kOwnerMetadata[] = "tickmark-owner";
inline constexpr char kSessionMetadata[] = "tickmark-session";

inline grpc::Status ToGrpc(const absl::Status& s) {
  if (s.ok()) return grpc::Status::OK;
  return grpc::Status(static_cast<grpc::StatusCode>(s.code()), std::string(s.message()));
}

inline absl::Status FromGrpc(const grpc::Status& s) {
  if (s.ok()) return absl::OkStatus();
  return absl::Status(static_cast<absl::StatusCode>(s.error_code()), s.error_message());
}

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_STATUS_H_

// absl::Status <-> grpc::Status, in one place (docs/conventions.md habit 2). The codes
// are the same numbers on both sides.
#ifndef TICKMARK_SERVER_RPC_STATUS_H_
#define TICKMARK_SERVER_RPC_STATUS_H_

#include <grpcpp/support/status.h>

#include <string>

#include "absl/status/status.h"

namespace tickmark::rpc {

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

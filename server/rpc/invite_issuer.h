// Join links for the web page (SessionAdmin.CreateInvite, docs/web.md), as
// the admin service sees them: AdminService authenticates the caller and
// checks that it is the session's admin (or the operator); the web bridge
// (server/web, wired in by tickmarkd) makes the code. rpc does not depend on
// server/web: it knows the bridge only through this interface.
#ifndef TICKMARK_SERVER_RPC_INVITE_ISSUER_H_
#define TICKMARK_SERVER_RPC_INVITE_ISSUER_H_

#include "absl/status/statusor.h"
#include "tickmark/v1/admin.pb.h"

namespace tickmark::rpc {

class InviteIssuer {
 public:
  virtual ~InviteIssuer() = default;
  // Called once the caller is authorized for request.session_id(); checks
  // the rest of the request. Thread-safe.
  virtual absl::StatusOr<tickmark::v1::CreateInviteResponse> CreateInvite(
      const tickmark::v1::CreateInviteRequest& request) = 0;
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_INVITE_ISSUER_H_

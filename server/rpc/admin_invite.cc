// SessionAdmin.CreateInvite: authorization here, the code in the web bridge
// (server/rpc/invite_issuer.h). In a file of its own so that the admin
// service's other calls stay as they were.
#include "server/rpc/admin_service.h"
#include "server/rpc/status.h"

namespace tickmark::rpc {

namespace v1 = tickmark::v1;

grpc::ServerUnaryReactor* AdminService::CreateInvite(grpc::CallbackServerContext* ctx,
                                                     const v1::CreateInviteRequest* req,
                                                     v1::CreateInviteResponse* resp) {
  auto* reactor = ctx->DefaultReactor();
  auto finish = [reactor](const absl::Status& s) {
    reactor->Finish(ToGrpc(s));
    return reactor;
  };
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return finish(who.status());
  if (absl::Status s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN}); !s.ok()) {
    return finish(s);
  }
  if (invites_ == nullptr) {
    return finish(absl::FailedPreconditionError(
        "this server has no web port, so there is no page to invite to: start tickmarkd with "
        "--http-listen HOST:PORT (docs/web.md)"));
  }
  auto made = invites_->CreateInvite(*req);
  if (!made.ok()) return finish(made.status());
  *resp = std::move(*made);
  return finish(absl::OkStatus());
}

}  // namespace tickmark::rpc

// SessionAdmin (proto/tickmark/v1/admin.proto) on the gRPC callback API.
// Every call authenticates from the "authorization" metadata.
// Thread-safe: gRPC calls handlers concurrently.
#ifndef TICKMARK_SERVER_RPC_ADMIN_SERVICE_H_
#define TICKMARK_SERVER_RPC_ADMIN_SERVICE_H_

#include "server/rpc/auth.h"
#include "server/rpc/invite_issuer.h"
#include "server/rpc/session_hub.h"
#include "tickmark/v1/admin.grpc.pb.h"

namespace tickmark::rpc {

class AdminService final : public tickmark::v1::SessionAdmin::CallbackService {
 public:
  // `invites` (may be null: no web port) makes CreateInvite's codes.
  AdminService(SessionHub* hub, TokenAuthority* auth, InviteIssuer* invites = nullptr)
      : hub_(hub), auth_(auth), invites_(invites) {}

  grpc::ServerUnaryReactor* CreateSession(grpc::CallbackServerContext* ctx,
                                          const tickmark::v1::CreateSessionRequest* req,
                                          tickmark::v1::CreateSessionResponse* resp) override;
  grpc::ServerUnaryReactor* GetSession(grpc::CallbackServerContext* ctx,
                                       const tickmark::v1::GetSessionRequest* req,
                                       tickmark::v1::SessionSummary* resp) override;
  grpc::ServerUnaryReactor* ListSessions(grpc::CallbackServerContext* ctx,
                                         const tickmark::v1::ListSessionsRequest* req,
                                         tickmark::v1::ListSessionsResponse* resp) override;
  grpc::ServerUnaryReactor* CloseSession(grpc::CallbackServerContext* ctx,
                                         const tickmark::v1::CloseSessionRequest* req,
                                         tickmark::v1::Session* resp) override;
  grpc::ServerUnaryReactor* IssueToken(grpc::CallbackServerContext* ctx,
                                       const tickmark::v1::IssueTokenRequest* req,
                                       tickmark::v1::IssueTokenResponse* resp) override;
  grpc::ServerUnaryReactor* RevokeToken(grpc::CallbackServerContext* ctx,
                                        const tickmark::v1::RevokeTokenRequest* req,
                                        tickmark::v1::RevokeTokenResponse* resp) override;
  grpc::ServerUnaryReactor* ListTokens(grpc::CallbackServerContext* ctx,
                                       const tickmark::v1::ListTokensRequest* req,
                                       tickmark::v1::ListTokensResponse* resp) override;
  grpc::ServerUnaryReactor* AddMarker(grpc::CallbackServerContext* ctx,
                                      const tickmark::v1::AddMarkerRequest* req,
                                      tickmark::v1::AddMarkerResponse* resp) override;
  grpc::ServerUnaryReactor* SetKernel(grpc::CallbackServerContext* ctx,
                                      const tickmark::v1::SetKernelRequest* req,
                                      tickmark::v1::SetKernelResponse* resp) override;
  grpc::ServerUnaryReactor* ListCalibrations(grpc::CallbackServerContext* ctx,
                                             const tickmark::v1::ListCalibrationsRequest* req,
                                             tickmark::v1::ListCalibrationsResponse* resp) override;
  grpc::ServerUnaryReactor* GetCalibration(grpc::CallbackServerContext* ctx,
                                           const tickmark::v1::GetCalibrationRequest* req,
                                           tickmark::v1::Calibration* resp) override;
  grpc::ServerUnaryReactor* ApplyCalibration(grpc::CallbackServerContext* ctx,
                                             const tickmark::v1::ApplyCalibrationRequest* req,
                                             tickmark::v1::SetKernelResponse* resp) override;
  grpc::ServerWriteReactor<tickmark::v1::ReplayProgress>* Replay(
      grpc::CallbackServerContext* ctx, const tickmark::v1::ReplayRequest* req) override;
  grpc::ServerWriteReactor<tickmark::v1::RetimeResponse>* Retime(
      grpc::CallbackServerContext* ctx, const tickmark::v1::RetimeRequest* req) override;
  // In admin_invite.cc.
  grpc::ServerUnaryReactor* CreateInvite(grpc::CallbackServerContext* ctx,
                                         const tickmark::v1::CreateInviteRequest* req,
                                         tickmark::v1::CreateInviteResponse* resp) override;
  grpc::ServerUnaryReactor* EraseParticipant(grpc::CallbackServerContext* ctx,
                                             const tickmark::v1::EraseParticipantRequest* req,
                                             tickmark::v1::EraseParticipantResponse* resp) override;

  // In admin_study.cc (docs/studies.md).
  grpc::ServerUnaryReactor* CreateStudy(grpc::CallbackServerContext* ctx,
                                        const tickmark::v1::CreateStudyRequest* req,
                                        tickmark::v1::Study* resp) override;
  grpc::ServerUnaryReactor* AddStudyCondition(grpc::CallbackServerContext* ctx,
                                              const tickmark::v1::AddStudyConditionRequest* req,
                                              tickmark::v1::Study* resp) override;
  grpc::ServerUnaryReactor* EnrollParticipants(grpc::CallbackServerContext* ctx,
                                               const tickmark::v1::EnrollParticipantsRequest* req,
                                               tickmark::v1::Study* resp) override;
  grpc::ServerUnaryReactor* MakeStudySchedule(grpc::CallbackServerContext* ctx,
                                              const tickmark::v1::MakeStudyScheduleRequest* req,
                                              tickmark::v1::Study* resp) override;
  grpc::ServerUnaryReactor* GetStudy(grpc::CallbackServerContext* ctx,
                                     const tickmark::v1::GetStudyRequest* req,
                                     tickmark::v1::Study* resp) override;
  grpc::ServerUnaryReactor* ListStudies(grpc::CallbackServerContext* ctx,
                                        const tickmark::v1::ListStudiesRequest* req,
                                        tickmark::v1::ListStudiesResponse* resp) override;

 private:
  SessionHub* hub_;         // not owned
  TokenAuthority* auth_;    // not owned
  InviteIssuer* invites_;   // not owned; null without a web port
};

// The caller's principal from "authorization" metadata.
absl::StatusOr<Principal> AuthenticateContext(const grpc::ServerContextBase& ctx,
                                              const TokenAuthority& auth);
// OK if the principal may act on `session_id` with one of `roles` (the
// operator token may act on any session as admin).
absl::Status Authorize(const Principal& who, const std::string& session_id,
                       std::initializer_list<tickmark::v1::Role> roles);

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_ADMIN_SERVICE_H_

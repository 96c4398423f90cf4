#include "server/rpc/admin_service.h"

#include <cmath>
#include <deque>
#include <future>
#include <mutex>
#include <set>
#include <thread>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/rpc/credit_driver.h"
#include "server/rpc/retime_runner.h"
#include "server/rpc/status.h"
#include "tickmark/version.h"
#include "server/rpc/study_journal.h"

namespace tickmark::rpc {

namespace v1 = tickmark::v1;

absl::StatusOr<Principal> AuthenticateContext(const grpc::ServerContextBase& ctx,
                                              const TokenAuthority& auth) {
  const auto& md = ctx.client_metadata();
  auto it = md.find("authorization");
  if (it == md.end()) return auth.Authenticate("");
  std::string_view value(it->second.data(), it->second.size());
  return auth.Authenticate(BearerSecret(value));
}

absl::Status Authorize(const Principal& who, const std::string& session_id,
                       std::initializer_list<v1::Role> roles) {
  if (who.operator_token()) return absl::OkStatus();
  if (who.session_id != session_id) {
    // Never reveal whether another session exists.
    return absl::PermissionDeniedError("this token belongs to another session");
  }
  for (v1::Role r : roles) {
    if (who.role == r) return absl::OkStatus();
  }
  return absl::PermissionDeniedError(
      Cat("a ", v1::Role_Name(who.role), " token may not do this"));
}

namespace {

v1::Session ToProto(const ledger::SessionRow& row) {
  v1::Session s;
  s.set_id(row.id);
  s.set_title(row.title);
  s.set_study(row.study);
  s.set_state(row.open ? v1::SESSION_STATE_OPEN : v1::SESSION_STATE_CLOSED);
  s.set_opened_session_ns(row.opened_session_ns);
  s.set_closed_session_ns(row.closed_session_ns);
  s.set_last_sequence(row.last_sequence);
  s.set_pin_kernels(row.pin_kernels);
  s.set_condition(row.condition);
  for (const std::string& p : row.participants) s.add_participants(p);
  s.set_chain_version(row.chain_version);
  return s;
}

v1::TokenInfo ToProto(const ledger::TokenRow& row) {
  v1::TokenInfo t;
  t.set_token_id(row.id);
  t.set_session_id(row.session_id);
  t.set_role(row.role);
  t.set_subject(row.subject);
  t.set_revoked(row.revoked);
  t.set_issued_session_ns(row.issued_session_ns);
  return t;
}

// The session default kernel's text: from the loaded runtime, or else from
// the session's first records (SessionHub::Create writes it second).
std::string DefaultKernelOf(SessionHub* hub, const std::string& session_id) {
  if (auto rt = hub->Find(session_id)) {
    if (std::string k = rt->default_kernel(); !k.empty()) return k;
  }
  auto head = hub->ledger()->Read(session_id, 1, 16);
  if (!head.ok()) return "";
  for (const v1::Record& r : *head) {
    if (r.has_kernel() && r.kernel().trainer().empty()) return r.kernel().description();
  }
  return "";
}

void FillLedgerHealth(ledger::Ledger* ledger, v1::LedgerHealth* out) {
  const absl::Status write = ledger->WriteHealth();
  out->set_writable(write.ok());
  if (!write.ok()) out->set_reason(write.ToString());
}

absl::Status Summarize(SessionHub* hub, const ledger::SessionRow& row, v1::SessionSummary* out) {
  *out->mutable_session() = ToProto(row);
  auto counts = hub->ledger()->Counts(row.id);
  if (!counts.ok()) return counts.status();
  out->set_feedback_count(counts->feedback);
  out->set_step_count(counts->steps);
  out->set_probe_count(counts->probes);
  out->set_marker_count(counts->markers);
  out->set_client_count(counts->clients);
  out->set_late_count(counts->late);
  out->set_unmatched_count(counts->unmatched);
  out->set_rejected_probe_count(counts->rejected_probes);
  out->set_sync_pulse_count(counts->sync_pulses);
  out->set_default_kernel(DefaultKernelOf(hub, row.id));
  // Made under a study: its name, and the study record that registered it.
  if (!row.condition.empty()) {
    if (auto study = LoadStudy(hub->ledger(), row.study); study.ok()) {
      out->set_study_name(study->name());
      for (const auto& entry : study->sessions()) {
        if (entry.session_id() == row.id) {
          out->mutable_session()->set_study_sequence(entry.sequence());
        }
      }
    }
  }
  FillLedgerHealth(hub->ledger(), out->mutable_ledger_health());
  out->set_server_version(kVersion);
  out->set_contract_version(kContractVersion);
  if (auto receipt = hub->ledger()->GetReceipt(row.id); receipt.ok() && receipt->has_value()) {
    *out->mutable_receipt() = **receipt;
  }
  // A session nobody has touched since the start has no streams; Find
  // avoids loading it (and replaying its ledger) just to say so.
  if (auto rt = hub->Find(row.id)) {
    out->set_connected_clients(static_cast<uint32_t>(rt->StreamCount()));
    for (v1::ClientClock& c : rt->Clocks()) *out->add_clocks() = std::move(c);
  }
  return absl::OkStatus();
}

grpc::ServerUnaryReactor* Done(grpc::CallbackServerContext* ctx, const absl::Status& s) {
  auto* reactor = ctx->DefaultReactor();
  reactor->Finish(ToGrpc(s));
  return reactor;
}

// Appends `record` and finishes the call only once it is committed, after
// `fill` has put its sequence into the response.
grpc::ServerUnaryReactor* AppendThenFinish(grpc::CallbackServerContext* ctx,
                                           SessionRuntime& runtime, v1::Record record,
                                           std::function<void(uint64_t)> fill) {
  auto* reactor = ctx->DefaultReactor();
  auto seq = runtime.AppendRecord(
      std::move(record), [reactor, fill](const absl::Status& s, const v1::Record& committed) {
        if (s.ok()) fill(committed.sequence());
        reactor->Finish(ToGrpc(s));
      });
  if (!seq.ok()) reactor->Finish(ToGrpc(seq.status()));
  return reactor;
}

}  // namespace

grpc::ServerUnaryReactor* AdminService::CreateSession(grpc::CallbackServerContext* ctx,
                                                      const v1::CreateSessionRequest* req,
                                                      v1::CreateSessionResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (!who->operator_token()) {
    return Done(ctx, absl::PermissionDeniedError("creating a session needs the operator token"));
  }
  if (req->title().size() > 256 || req->study().size() > 128) {
    return Done(ctx, absl::InvalidArgumentError("title (256) or study (128) too long"));
  }
  // Under a study (docs/studies.md): the condition's settings, enrolled
  // participants, and a record in the study's journal naming the session.
  std::unique_lock<std::mutex> study_lock(StudyMutex(), std::defer_lock);
  std::string study = req->study();
  std::string default_kernel = req->default_kernel();
  bool pin_kernels = req->pin_kernels();
  SessionHub::StudyPart part;
  if (!req->study_id().empty()) {
    if (!req->study().empty() && req->study() != req->study_id()) {
      return Done(ctx, absl::InvalidArgumentError("give study_id or study, not both"));
    }
    if (!req->default_kernel().empty() || req->pin_kernels()) {
      return Done(ctx, absl::InvalidArgumentError(
                           "a session under a study takes its kernel settings from the "
                           "condition; leave default_kernel and pin_kernels unset"));
    }
    if (req->condition().empty()) {
      return Done(ctx, absl::InvalidArgumentError("a session under a study needs a condition"));
    }
    study_lock.lock();
    auto loaded = LoadStudy(hub_->ledger(), req->study_id());
    if (!loaded.ok()) return Done(ctx, loaded.status());
    const v1::StudyCondition* condition = nullptr;
    for (const auto& c : loaded->conditions()) {
      if (c.name() == req->condition()) condition = &c;
    }
    if (condition == nullptr) {
      return Done(ctx, absl::NotFoundError(Cat("study ", req->study_id(), " has no condition '",
                                               req->condition(), "'")));
    }
    std::set<std::string> enrolled(loaded->participants().begin(), loaded->participants().end());
    for (const std::string& p : req->participants()) {
      if (enrolled.count(p) == 0) {
        return Done(ctx, absl::FailedPreconditionError(
                             Cat("participant '", p, "' is not enrolled in study ", req->study_id(),
                                 " (tickmark study enroll)")));
      }
    }
    study = req->study_id();
    default_kernel = condition->default_kernel();
    pin_kernels = condition->pin_kernels();
    part.condition = condition->name();
    part.participants.assign(req->participants().begin(), req->participants().end());
    part.allowed_lateness_ns = condition->allowed_lateness_ns();
  } else if (!req->condition().empty() || !req->participants().empty()) {
    return Done(ctx, absl::InvalidArgumentError("condition and participants need a study_id"));
  }
  auto rt = hub_->Create(req->title(), study, default_kernel, pin_kernels, part);
  if (!rt.ok()) return Done(ctx, rt.status());
  if (!req->study_id().empty()) {
    v1::StudyEvent e;
    e.set_event(v1::StudyEvent::KIND_SESSION);
    e.set_name(part.condition);
    e.set_session_id((*rt)->id());
    *e.mutable_participants() = req->participants();
    e.set_author("operator");
    auto committed =
        AppendStudyEvent(hub_->ledger(), req->study_id(), std::move(e), hub_->UtcNowNanos());
    if (!committed.ok()) return Done(ctx, committed.status());
    resp->mutable_session()->set_study_sequence(committed->sequence());
  }
  auto issued = auth_->Issue((*rt)->id(), v1::ROLE_ADMIN, "", (*rt)->Now().nanos());
  if (!issued.ok()) return Done(ctx, issued.status());
  auto row = hub_->ledger()->GetSession((*rt)->id());
  if (!row.ok()) return Done(ctx, row.status());
  const uint64_t study_sequence = resp->session().study_sequence();
  *resp->mutable_session() = ToProto(*row);
  resp->mutable_session()->set_study_sequence(study_sequence);
  *resp->mutable_admin_token() = ToProto(issued->first);
  resp->set_admin_secret(issued->second);
  TM_LOG(kInfo) << "session " << row->id << " opened (" << row->title << ")";
  return Done(ctx, absl::OkStatus());
}

grpc::ServerUnaryReactor* AdminService::GetSession(grpc::CallbackServerContext* ctx,
                                                   const v1::GetSessionRequest* req,
                                                   v1::SessionSummary* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (absl::Status s = Authorize(*who, req->session_id(),
                                 {v1::ROLE_ADMIN, v1::ROLE_TRAINER, v1::ROLE_AGENT,
                                  v1::ROLE_OBSERVER});
      !s.ok()) {
    return Done(ctx, s);
  }
  auto row = hub_->ledger()->GetSession(req->session_id());
  if (!row.ok()) return Done(ctx, row.status());
  return Done(ctx, Summarize(hub_, *row, resp));
}

grpc::ServerUnaryReactor* AdminService::ListSessions(grpc::CallbackServerContext* ctx,
                                                     const v1::ListSessionsRequest* req,
                                                     v1::ListSessionsResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (!who->operator_token()) {
    return Done(ctx, absl::PermissionDeniedError("listing sessions needs the operator token"));
  }
  auto rows = hub_->ledger()->ListSessions(req->include_closed());
  if (!rows.ok()) return Done(ctx, rows.status());
  for (const auto& row : *rows) {
    if (absl::Status s = Summarize(hub_, row, resp->add_sessions()); !s.ok()) return Done(ctx, s);
  }
  return Done(ctx, absl::OkStatus());
}

grpc::ServerUnaryReactor* AdminService::CloseSession(grpc::CallbackServerContext* ctx,
                                                     const v1::CloseSessionRequest* req,
                                                     v1::Session* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (absl::Status s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN}); !s.ok()) {
    return Done(ctx, s);
  }
  if (absl::Status s = hub_->Close(req->session_id()); !s.ok()) return Done(ctx, s);
  auto row = hub_->ledger()->GetSession(req->session_id());
  if (!row.ok()) return Done(ctx, row.status());
  *resp = ToProto(*row);
  TM_LOG(kInfo) << "session " << row->id << " closed";
  return Done(ctx, absl::OkStatus());
}

grpc::ServerUnaryReactor* AdminService::IssueToken(grpc::CallbackServerContext* ctx,
                                                   const v1::IssueTokenRequest* req,
                                                   v1::IssueTokenResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (absl::Status s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN}); !s.ok()) {
    return Done(ctx, s);
  }
  auto rt = hub_->Get(req->session_id());
  if (!rt.ok()) return Done(ctx, rt.status());
  if (!(*rt)->open()) {
    return Done(ctx, absl::FailedPreconditionError("session is closed; no new tokens"));
  }
  switch (req->role()) {
    case v1::ROLE_TRAINER:
    case v1::ROLE_AGENT:
      if (!IsValidName(req->subject())) {
        return Done(ctx, absl::InvalidArgumentError(
                             "trainer and agent tokens need a subject: 1-64 characters of "
                             "letters, digits, '.', '_', ':' or '-' (a pseudonym, not a real name)"));
      }
      break;
    case v1::ROLE_ADMIN:
    case v1::ROLE_OBSERVER:
      if (!req->subject().empty() && !IsValidName(req->subject())) {
        return Done(ctx, absl::InvalidArgumentError("subject has characters outside [A-Za-z0-9._:-]"));
      }
      break;
    default:
      return Done(ctx, absl::InvalidArgumentError("role must be admin, trainer, agent or observer"));
  }
  auto issued = auth_->Issue(req->session_id(), req->role(), req->subject(), (*rt)->Now().nanos());
  if (!issued.ok()) return Done(ctx, issued.status());
  *resp->mutable_token() = ToProto(issued->first);
  resp->set_secret(issued->second);
  return Done(ctx, absl::OkStatus());
}

grpc::ServerUnaryReactor* AdminService::RevokeToken(grpc::CallbackServerContext* ctx,
                                                    const v1::RevokeTokenRequest* req,
                                                    v1::RevokeTokenResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (absl::Status s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN}); !s.ok()) {
    return Done(ctx, s);
  }
  auto row = hub_->ledger()->RevokeToken(req->session_id(), req->token_id());
  if (!row.ok()) return Done(ctx, row.status());
  if (auto rt = hub_->Find(req->session_id())) {  // not loaded: no streams to end
    rt->EndStreamsOf(row->id,
                     absl::UnauthenticatedError(Cat("token ", row->id, " has been revoked")));
  }
  *resp->mutable_token() = ToProto(*row);
  return Done(ctx, absl::OkStatus());
}

grpc::ServerUnaryReactor* AdminService::ListTokens(grpc::CallbackServerContext* ctx,
                                                   const v1::ListTokensRequest* req,
                                                   v1::ListTokensResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (absl::Status s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN}); !s.ok()) {
    return Done(ctx, s);
  }
  auto rows = hub_->ledger()->ListTokens(req->session_id());
  if (!rows.ok()) return Done(ctx, rows.status());
  for (const auto& row : *rows) *resp->add_tokens() = ToProto(row);
  return Done(ctx, absl::OkStatus());
}

grpc::ServerUnaryReactor* AdminService::AddMarker(grpc::CallbackServerContext* ctx,
                                                  const v1::AddMarkerRequest* req,
                                                  v1::AddMarkerResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  // Markers are the admin's (the role table): an agent marks its own
  // timeline with steps, not with session markers.
  if (absl::Status s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN}); !s.ok()) {
    return Done(ctx, s);
  }
  if (req->text().empty() || req->text().size() > 1024) {
    return Done(ctx, absl::InvalidArgumentError("marker text must be 1-1024 bytes"));
  }
  auto rt = hub_->Get(req->session_id());
  if (!rt.ok()) return Done(ctx, rt.status());
  if (!(*rt)->open()) return Done(ctx, absl::FailedPreconditionError("session is closed"));
  const int64_t now = (*rt)->Now().nanos();
  // Saturating time arithmetic: the requested time may be any int64.
  if (req->at_session_ns() != 0 &&
      Abs(SessionTime::FromNanos(req->at_session_ns()) - SessionTime::FromNanos(now)) >
          Duration::Seconds(86'400)) {
    return Done(ctx, absl::InvalidArgumentError("marker time is more than a day from now"));
  }
  v1::Record r;
  r.set_written_session_ns(now);
  v1::Marker* m = r.mutable_marker();
  m->set_at_session_ns(req->at_session_ns() ? req->at_session_ns() : now);
  m->set_text(req->text());
  m->set_author(who->subject.empty() ? who->token_id : who->subject);
  *resp->mutable_marker() = *m;
  return AppendThenFinish(ctx, **rt, std::move(r),
                          [resp](uint64_t sequence) { resp->set_sequence(sequence); });
}

grpc::ServerUnaryReactor* AdminService::SetKernel(grpc::CallbackServerContext* ctx,
                                                  const v1::SetKernelRequest* req,
                                                  v1::SetKernelResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (absl::Status s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN}); !s.ok()) {
    return Done(ctx, s);
  }
  if (req->trainer().empty()) {
    return Done(ctx, absl::FailedPreconditionError(
                         "the session's default kernel is fixed when the session is created; "
                         "set a kernel per trainer instead"));
  }
  if (!IsValidName(req->trainer())) {
    return Done(ctx, absl::InvalidArgumentError("trainer must be 1-64 of [A-Za-z0-9._:-]"));
  }
  if (!std::isfinite(req->weight()) || req->weight() < 0 || req->weight() > 1e6) {
    return Done(ctx, absl::InvalidArgumentError("weight must be finite and in [0, 1e6]"));
  }
  auto kernel = ParseKernel(req->kernel());
  if (!kernel.ok()) return Done(ctx, kernel.status());
  auto rt = hub_->Get(req->session_id());
  if (!rt.ok()) return Done(ctx, rt.status());
  if (!(*rt)->open()) return Done(ctx, absl::FailedPreconditionError("session is closed"));
  v1::Record r;
  r.set_written_session_ns((*rt)->Now().nanos());
  v1::KernelSetting* ks = r.mutable_kernel();
  ks->set_trainer(req->trainer());
  *ks->mutable_kernel() = KernelToProto(*kernel);
  ks->set_weight(req->weight() == 0 ? 1.0 : req->weight());
  ks->set_description(kernel->Describe());
  ks->set_author(who->subject.empty() ? who->token_id : who->subject);
  *resp->mutable_setting() = *ks;
  return AppendThenFinish(ctx, **rt, std::move(r),
                          [resp](uint64_t sequence) { resp->set_sequence(sequence); });
}

namespace {

// The trainers a principal may see calibrations of: nullopt for the
// operator (all); for a session admin, the subjects of the trainer tokens
// of its session.
absl::StatusOr<std::optional<std::set<std::string>>> VisibleTrainers(SessionHub* hub,
                                                                     const Principal& who) {
  if (who.operator_token()) return std::optional<std::set<std::string>>();
  if (who.role != v1::ROLE_ADMIN) {
    return absl::PermissionDeniedError(
        Cat("a ", v1::Role_Name(who.role), " token may not read calibrations"));
  }
  auto tokens = hub->ledger()->ListTokens(who.session_id);
  if (!tokens.ok()) return tokens.status();
  std::set<std::string> trainers;
  for (const auto& t : *tokens) {
    if (t.role == v1::ROLE_TRAINER) trainers.insert(t.subject);
  }
  return std::optional<std::set<std::string>>(std::move(trainers));
}

v1::CalibrationSummary ToProto(const ledger::CalibrationRow& row) {
  v1::CalibrationSummary c;
  c.set_id(row.id);
  c.set_trainer(row.trainer);
  c.set_session_id(row.session_id);
  c.set_sequence(row.sequence);
  c.set_created_session_ns(row.created_session_ns);
  c.set_family(row.family);
  c.set_kernel_description(row.kernel_description);
  c.set_valid(row.valid);
  c.set_warning(row.warning);
  c.set_source_kind(row.source_kind);
  return c;
}

}  // namespace

grpc::ServerUnaryReactor* AdminService::ListCalibrations(grpc::CallbackServerContext* ctx,
                                                         const v1::ListCalibrationsRequest* req,
                                                         v1::ListCalibrationsResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  auto visible = VisibleTrainers(hub_, *who);
  if (!visible.ok()) return Done(ctx, visible.status());
  auto rows = hub_->ledger()->ListCalibrations(req->trainer());
  if (!rows.ok()) return Done(ctx, rows.status());
  for (const auto& row : *rows) {
    if (*visible && !(*visible)->count(row.trainer)) continue;
    *resp->add_calibrations() = ToProto(row);
  }
  return Done(ctx, absl::OkStatus());
}

grpc::ServerUnaryReactor* AdminService::GetCalibration(grpc::CallbackServerContext* ctx,
                                                       const v1::GetCalibrationRequest* req,
                                                       v1::Calibration* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  auto visible = VisibleTrainers(hub_, *who);
  if (!visible.ok()) return Done(ctx, visible.status());
  std::optional<v1::Record> record;
  if (!req->id().empty()) {
    auto r = hub_->ledger()->GetCalibration(req->id());
    if (!r.ok()) return Done(ctx, r.status());
    record = *std::move(r);
  } else if (!req->trainer().empty()) {
    auto r = hub_->ledger()->LatestCalibration(req->trainer());
    if (!r.ok()) return Done(ctx, r.status());
    if (!r->has_value()) {
      return Done(ctx, absl::NotFoundError(Cat("trainer '", req->trainer(),
                                               "' has no calibration on this server")));
    }
    record = **std::move(r);
  } else {
    return Done(ctx, absl::InvalidArgumentError("name a calibration id or a trainer"));
  }
  if (*visible && !(*visible)->count(record->calibration().trainer())) {
    // As for an unknown id: never reveal another session's trainers.
    return Done(ctx, absl::NotFoundError(
                         Cat("no calibration '", req->id().empty() ? req->trainer() : req->id(),
                             "' for the trainers of this session")));
  }
  *resp = record->calibration();
  return Done(ctx, absl::OkStatus());
}

grpc::ServerUnaryReactor* AdminService::ApplyCalibration(grpc::CallbackServerContext* ctx,
                                                         const v1::ApplyCalibrationRequest* req,
                                                         v1::SetKernelResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (absl::Status s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN}); !s.ok()) {
    return Done(ctx, s);
  }
  if (!std::isfinite(req->weight()) || req->weight() < 0 || req->weight() > 1e6) {
    return Done(ctx, absl::InvalidArgumentError("weight must be finite and in [0, 1e6]"));
  }
  if (req->calibration_id().empty()) {
    return Done(ctx, absl::InvalidArgumentError("name the calibration to apply"));
  }
  auto record = hub_->ledger()->GetCalibration(req->calibration_id());
  if (!record.ok()) return Done(ctx, record.status());
  const v1::Calibration& c = record->calibration();
  if (!who->operator_token()) {
    auto visible = VisibleTrainers(hub_, *who);
    if (!visible.ok()) return Done(ctx, visible.status());
    if (*visible && !(*visible)->count(c.trainer())) {
      return Done(ctx, absl::NotFoundError(Cat("no calibration '", req->calibration_id(),
                                               "' for the trainers of this session")));
    }
  }
  auto kernel = KernelFromProto(c.kernel());
  if (!kernel.ok()) return Done(ctx, kernel.status());
  auto rt = hub_->Get(req->session_id());
  if (!rt.ok()) return Done(ctx, rt.status());
  if (!(*rt)->open()) return Done(ctx, absl::FailedPreconditionError("session is closed"));
  v1::Record r;
  r.set_written_session_ns((*rt)->Now().nanos());
  v1::KernelSetting* ks = r.mutable_kernel();
  ks->set_trainer(c.trainer());
  *ks->mutable_kernel() = c.kernel();
  ks->set_weight(req->weight() == 0 ? 1.0 : req->weight());
  ks->set_description(c.kernel_description());
  ks->set_author(who->subject.empty() ? who->token_id : who->subject);
  ks->set_calibration(c.id());
  *resp->mutable_setting() = *ks;
  return AppendThenFinish(ctx, **rt, std::move(r),
                          [resp](uint64_t sequence) { resp->set_sequence(sequence); });
}

namespace {

// Streams messages produced by a worker thread. The worker calls Push() and
// then End(); the reactor writes one message at a time. (Replay, Retime.)
template <typename Msg>
class WorkerWriteReactor final : public grpc::ServerWriteReactor<Msg> {
 public:
  explicit WorkerWriteReactor(const char* what) : what_(what) {}
  void Push(Msg m) {
    std::lock_guard<std::mutex> lock(mu_);
    queue_.push_back(std::move(m));
    PumpLocked();
  }
  void End(const absl::Status& status) {
    std::lock_guard<std::mutex> lock(mu_);
    end_ = status;
    PumpLocked();
  }
  bool cancelled() const { return cancelled_.load(); }
  // The worker thread; joined in OnDone.
  std::thread worker;

  void OnWriteDone(bool ok) override {
    std::lock_guard<std::mutex> lock(mu_);
    writing_ = false;
    if (!ok) cancelled_ = true;
    PumpLocked();
  }
  void OnCancel() override { cancelled_ = true; }
  void OnDone() override {
    if (worker.joinable()) worker.join();
    delete this;
  }

 private:
  void PumpLocked() {
    if (writing_ || finished_) return;
    if (!queue_.empty() && !cancelled_) {
      current_ = std::move(queue_.front());
      queue_.pop_front();
      writing_ = true;
      this->StartWrite(&current_);
      return;
    }
    if (end_) {
      finished_ = true;
      this->Finish(ToGrpc(cancelled_ ? absl::CancelledError(Cat(what_, " cancelled")) : *end_));
    }
  }

  const char* const what_;  // "replay", "retiming"
  std::mutex mu_;
  std::deque<Msg> queue_;  // GUARDED_BY(mu_)
  Msg current_;            // being written
  bool writing_ = false;
  bool finished_ = false;
  std::optional<absl::Status> end_;
  std::atomic<bool> cancelled_{false};
};
using ReplayReactor = WorkerWriteReactor<v1::ReplayProgress>;
using RetimeReactor = WorkerWriteReactor<v1::RetimeResponse>;

bool ValidSetName(const std::string& name) {
  if (name.empty() || name.size() > 64 || name == "live") return false;
  for (char c : name) {
    if (!(std::isalnum(static_cast<unsigned char>(c)) || c == '-' || c == '_' || c == '.')) {
      return false;
    }
  }
  return true;
}

// The replay itself: recompute, compare, store. Runs on the worker thread.
absl::Status RunReplay(SessionHub* hub, const v1::ReplayRequest& req, ReplayReactor* out) {
  CreditDriver::Overrides overrides;
  if (!req.kernel().empty()) {
    auto k = ParseKernel(req.kernel());
    if (!k.ok()) return k.status();
    overrides.all = *k;
  }
  for (const auto& [trainer, text] : req.trainer_kernels()) {
    auto k = ParseKernel(text);
    if (!k.ok()) return k.status();
    overrides.trainers.insert_or_assign(trainer, *k);
  }
  ledger::Ledger* ledger = hub->ledger();
  // The session's trainers: the subjects of its trainer tokens.
  std::set<std::string> trainers;
  {
    auto tokens = ledger->ListTokens(req.session_id());
    if (!tokens.ok()) return tokens.status();
    for (const auto& t : *tokens) {
      if (t.role == v1::ROLE_TRAINER) trainers.insert(t.subject);
    }
  }
  // --calibrated: each trainer's latest calibration (all made before now),
  // unless an explicit kernel names that trainer's kernel already.
  std::map<std::string, std::string> calibration_of;
  if (req.calibrated() && req.kernel().empty()) {
    for (const std::string& trainer : trainers) {
      if (overrides.trainers.count(trainer)) continue;
      auto latest = ledger->LatestCalibration(trainer);
      if (!latest.ok()) return latest.status();
      if (!latest->has_value()) continue;
      const v1::Calibration& c = (*latest)->calibration();
      auto k = KernelFromProto(c.kernel());
      if (!k.ok()) return k.status();
      overrides.trainers.insert_or_assign(trainer, *k);
      calibration_of[trainer] = c.id();
    }
  }
  // --retimed: event times from a derived time set (retime_runner.h).
  std::optional<DerivedTimes> times;
  if (!req.time_set().empty()) {
    auto loaded = LoadDerivedTimes(ledger, req.session_id(), req.time_set());
    if (!loaded.ok()) return loaded.status();
    times = *std::move(loaded);
  }
  uint64_t retimed_records = 0;
  const uint64_t total = ledger->CommittedSequence(req.session_id());
  CreditDriver driver(std::move(overrides));
  std::vector<v1::Record> derived;
  std::map<uint64_t, double> live;  // step sequence -> live label value
  auto last_report = std::chrono::steady_clock::now();
  for (uint64_t next = 1; next <= total;) {
    if (out->cancelled()) return absl::CancelledError("replay cancelled");
    auto chunk = ledger->Read(req.session_id(), next, 4096);
    if (!chunk.ok()) return chunk.status();
    if (chunk->empty()) break;
    for (const v1::Record& r : *chunk) {
      if (r.sequence() > total) break;
      if (r.has_label()) live[r.label().step_sequence()] = r.label().value();
      if (times && (r.has_feedback() || r.has_step())) {
        v1::Record retimed = r;
        if (ApplyDerivedTimes(*times, &retimed)) {
          ++retimed_records;
          driver.Feed(retimed, &derived);
          continue;
        }
      }
      driver.Feed(r, &derived);
    }
    next = chunk->back().sequence() + 1;
    if (std::chrono::steady_clock::now() - last_report > std::chrono::milliseconds(200)) {
      v1::ReplayProgress p;
      p.set_done(std::min(next - 1, total));
      p.set_total(total);
      out->Push(std::move(p));
      last_report = std::chrono::steady_clock::now();
    }
  }
  v1::ReplayComparison cmp;
  std::map<uint64_t, double> replayed;
  for (const v1::Record& r : derived) {
    if (r.has_label()) replayed[r.label().step_sequence()] = r.label().value();
    if (r.has_credit()) cmp.set_credits(cmp.credits() + 1);
    if (r.has_unmatched()) cmp.set_unmatched(cmp.unmatched() + 1);
  }
  double sum_abs = 0;
  for (const auto& [step, value] : replayed) {
    auto it = live.find(step);
    if (it == live.end()) {
      cmp.set_only_replay(cmp.only_replay() + 1);
      continue;
    }
    cmp.set_labels(cmp.labels() + 1);
    const double d = std::fabs(value - it->second);
    sum_abs += d;
    cmp.set_max_abs_difference(std::max(cmp.max_abs_difference(), d));
    if (d > 1e-12) cmp.set_changed(cmp.changed() + 1);
    if ((value > 0 && it->second < 0) || (value < 0 && it->second > 0)) {
      cmp.set_sign_flips(cmp.sign_flips() + 1);
    }
  }
  for (const auto& [step, value] : live) {
    if (!replayed.count(step)) cmp.set_only_live(cmp.only_live() + 1);
  }
  if (cmp.labels() > 0) cmp.set_mean_abs_difference(sum_abs / static_cast<double>(cmp.labels()));
  for (const std::string& trainer : trainers) {
    (*cmp.mutable_trainer_kernels())[trainer] = driver.KernelOf(trainer);
    if (auto it = calibration_of.find(trainer); it != calibration_of.end()) {
      (*cmp.mutable_trainer_calibrations())[trainer] = it->second;
    } else if (std::string c = driver.CalibrationOf(trainer); !c.empty()) {
      (*cmp.mutable_trainer_calibrations())[trainer] = c;
    }
  }
  if (times) {
    cmp.set_time_set(times->set.id);
    cmp.set_retimed_records(retimed_records);
  }
  std::string spec = Cat("replay of sequences 1..", total, " with ", driver.Describe());
  if (times) {
    spec += Cat("; event times from time set ", times->set.id, " (", retimed_records,
                " records; the set covers sequences 1..", times->set.through_sequence, ")");
  }
  if (!calibration_of.empty()) {
    spec += "; calibrated:";
    for (const auto& [trainer, id] : calibration_of) spec += Cat(" ", trainer, "=", id);
  }
  if (absl::Status s =
          ledger->PutDerivedSet(req.session_id(), req.name(), spec, derived, req.overwrite());
      !s.ok()) {
    return s;
  }
  v1::ReplayProgress last;
  last.set_done(total);
  last.set_total(total);
  last.set_finished(true);
  *last.mutable_result() = cmp;
  out->Push(std::move(last));
  TM_LOG(kInfo) << "replay '" << req.name() << "' of " << req.session_id() << ": "
                << cmp.changed() << " of " << cmp.labels() << " labels changed";
  return absl::OkStatus();
}

}  // namespace

grpc::ServerWriteReactor<v1::ReplayProgress>* AdminService::Replay(
    grpc::CallbackServerContext* ctx, const v1::ReplayRequest* req) {
  auto* reactor = new ReplayReactor("replay");
  auto who = AuthenticateContext(*ctx, *auth_);
  absl::Status s = who.status();
  if (s.ok()) s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN});
  if (s.ok() && !ValidSetName(req->name())) {
    s = absl::InvalidArgumentError(
        "name the derived set: 1-64 of [A-Za-z0-9._-], not 'live'");
  }
  if (s.ok()) s = hub_->ledger()->GetSession(req->session_id()).status();
  if (!s.ok()) {
    reactor->End(s);
    return reactor;
  }
  reactor->worker = std::thread([hub = hub_, request = *req, reactor] {
    absl::Status st = RunReplay(hub, request, reactor);
    reactor->End(st);
  });
  return reactor;
}

grpc::ServerWriteReactor<v1::RetimeResponse>* AdminService::Retime(grpc::CallbackServerContext* ctx,
                                                                   const v1::RetimeRequest* req) {
  auto* reactor = new RetimeReactor("retiming");
  auto who = AuthenticateContext(*ctx, *auth_);
  absl::Status s = who.status();
  if (s.ok()) s = Authorize(*who, req->session_id(), {v1::ROLE_ADMIN});
  RetimeOptions options;
  if (s.ok() && req->half_window_s() != 0) {
    if (!std::isfinite(req->half_window_s()) || req->half_window_s() < 0.1 ||
        req->half_window_s() > 3600) {
      s = absl::InvalidArgumentError("half window must be between 0.1 and 3600 seconds");
    } else {
      options.half_window = Duration::FromSeconds(req->half_window_s());
      options.max_half_window = std::max(options.max_half_window, options.half_window);
    }
  }
  if (s.ok()) s = hub_->ledger()->GetSession(req->session_id()).status();
  if (!s.ok()) {
    reactor->End(s);
    return reactor;
  }
  // Off the gRPC thread: reading a long session and storing its set takes a while.
  reactor->worker =
      std::thread([ledger = hub_->ledger(), session = req->session_id(), options, reactor] {
        auto result = RunRetime(
            ledger, session, options,
            [reactor](uint64_t done, uint64_t total) {
              v1::RetimeResponse p;
              p.set_done(done);
              p.set_total(total);
              reactor->Push(std::move(p));
            },
            [reactor] { return reactor->cancelled(); });
        const absl::Status status = result.status();
        if (status.ok()) reactor->Push(*std::move(result));
        reactor->End(status);
      });
  return reactor;
}

grpc::ServerUnaryReactor* AdminService::EraseParticipant(
    grpc::CallbackServerContext* ctx, const v1::EraseParticipantRequest* req,
    v1::EraseParticipantResponse* resp) {
  auto who = AuthenticateContext(*ctx, *auth_);
  if (!who.ok()) return Done(ctx, who.status());
  if (!who->operator_token()) {
    return Done(ctx, absl::PermissionDeniedError("erasing a participant needs the operator token"));
  }
  if (!IsValidName(req->participant())) {
    return Done(ctx, absl::InvalidArgumentError(
                         "participant: the trainer pseudonym, 1-64 characters of letters, "
                         "digits, '.', '_', ':' or '-'"));
  }
  if (req->reason().size() > 256) return Done(ctx, absl::InvalidArgumentError("reason too long"));
  // One erasure at a time: the Erasure records and the deletion belong together.
  static std::mutex erase_mu;
  std::lock_guard<std::mutex> lock(erase_mu);
  ledger::Ledger* ledger = hub_->ledger();
  auto holdings = ledger->FindPersonalContent(req->participant());
  if (!holdings.ok()) return Done(ctx, holdings.status());
  for (const ledger::PersonalHolding& h : *holdings) {
    if (h.open && !h.sequences.empty()) {
      return Done(ctx, absl::FailedPreconditionError(
                           Cat("session ", h.session_id, " holding records of ",
                               req->participant(), " is open; close it first")));
    }
  }
  std::vector<std::string> sessions;
  const std::string author = who->subject.empty() ? who->token_id : who->subject;
  for (const ledger::PersonalHolding& h : *holdings) {
    if (h.sequences.empty()) {
      resp->add_version1_sessions(h.session_id);
      continue;
    }
    // First the record saying what is erased (chained like any record, the
    // one record a closed session takes), then the erasure itself: verify
    // accepts missing content only where an Erasure record names it.
    v1::Record r;
    r.set_written_session_ns(hub_->UtcNowNanos());
    v1::Erasure* e = r.mutable_erasure();
    e->set_participant(req->participant());
    e->set_author(author);
    e->set_reason(req->reason());
    for (uint64_t seq : h.sequences) e->add_sequences(seq);
    std::promise<absl::StatusOr<uint64_t>> committed;
    auto appended = ledger->Append(
        h.session_id, {std::move(r)},
        [&committed](const absl::Status& st, const std::vector<v1::Record>& records) {
          if (!st.ok()) {
            committed.set_value(st);
          } else {
            committed.set_value(records.front().sequence());
          }
        });
    if (!appended.ok()) return Done(ctx, appended.status());
    auto seq = committed.get_future().get();
    if (!seq.ok()) return Done(ctx, seq.status());
    auto* out = resp->add_sessions();
    out->set_session_id(h.session_id);
    out->set_records(h.sequences.size());
    out->set_erasure_sequence(*seq);
    sessions.push_back(h.session_id);
  }
  if (!sessions.empty()) {
    if (absl::Status s = ledger->ErasePersonalContent(req->participant(), sessions); !s.ok()) {
      return Done(ctx, absl::Status(s.code(), Cat("erasure recorded but not finished (run it "
                                                   "again): ", s.message())));
    }
  }
  TM_LOG(kInfo) << "participant " << req->participant() << " erased from " << sessions.size()
                << " session(s) by " << author;
  return Done(ctx, absl::OkStatus());
}

}  // namespace tickmark::rpc

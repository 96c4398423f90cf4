// SessionAdmin's study calls (docs/studies.md): CreateStudy,
// AddStudyCondition, EnrollParticipants, MakeStudySchedule, GetStudy,
// ListStudies. Each change is one StudyEvent record in the study's journal
// (server/rpc/study_journal.h); all need the operator token.
#include <cmath>
#include <set>

#include "server/base/log.h"
#include "server/base/strings.h"
#include "server/core/counterbalance.h"
#include "server/rpc/admin_service.h"
#include "server/rpc/credit_driver.h"
#include "server/rpc/status.h"
#include "server/rpc/study_journal.h"

namespace tickmark::rpc {

namespace v1 = tickmark::v1;

namespace {

grpc::ServerUnaryReactor* Finish(grpc::CallbackServerContext* ctx, const absl::Status& s) {
  auto* reactor = ctx->DefaultReactor();
  reactor->Finish(ToGrpc(s));
  return reactor;
}

absl::Status NeedOperator(grpc::CallbackServerContext* ctx, TokenAuthority* auth) {
  auto who = AuthenticateContext(*ctx, *auth);
  if (!who.ok()) return who.status();
  if (!who->operator_token()) {
    return absl::PermissionDeniedError("studies need the operator token");
  }
  return absl::OkStatus();
}

bool ValidStudyName(const std::string& name) {
  if (name.empty() || name.size() > 128) return false;
  for (char c : name) {
    bool ok = (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') ||
              c == '-' || c == '_' || c == '.' || c == ' ';
    if (!ok) return false;
  }
  return true;
}

// Appends `event` under the study lock's protection (the caller holds it)
// and answers with the study as its journal now reads.
absl::Status AppendAndLoad(SessionHub* hub, const std::string& id, v1::StudyEvent event,
                           v1::Study* out) {
  auto committed = AppendStudyEvent(hub->ledger(), id, std::move(event), hub->UtcNowNanos());
  if (!committed.ok()) return committed.status();
  auto study = LoadStudy(hub->ledger(), id);
  if (!study.ok()) return study.status();
  *out = std::move(*study);
  return absl::OkStatus();
}

}  // namespace

static absl::Status CheckCondition(const v1::StudyCondition& c, v1::StudyCondition* canonical) {
  if (!IsValidName(c.name())) {
    return absl::InvalidArgumentError(
        Cat("condition name '", c.name(), "': 1-64 letters, digits, '.', '_', ':' or '-'"));
  }
  *canonical = c;
  if (!c.default_kernel().empty()) {
    auto k = ParseKernel(c.default_kernel());
    if (!k.ok()) return k.status();
    canonical->set_default_kernel(k->Describe());
  }
  if (c.allowed_lateness_ns() < 0 || c.allowed_lateness_ns() > int64_t{3600} * 1'000'000'000) {
    return absl::InvalidArgumentError("allowed lateness must be within 0..1 h");
  }
  if (c.feedback_values_size() > 16) {
    return absl::InvalidArgumentError("at most 16 feedback values");
  }
  for (double v : c.feedback_values()) {
    if (!std::isfinite(v) || std::fabs(v) > 1000) {
      return absl::InvalidArgumentError("feedback values must be finite, within [-1000, 1000]");
    }
  }
  if (c.notes().size() > 4096) return absl::InvalidArgumentError("notes: at most 4096 bytes");
  return absl::OkStatus();
}

grpc::ServerUnaryReactor* AdminService::CreateStudy(grpc::CallbackServerContext* ctx,
                                                    const v1::CreateStudyRequest* req,
                                                    v1::Study* resp) {
  if (absl::Status s = NeedOperator(ctx, auth_); !s.ok()) return Finish(ctx, s);
  if (!ValidStudyName(req->name())) {
    return Finish(ctx, absl::InvalidArgumentError(
                           "study name: 1-128 letters, digits, spaces, '.', '_' or '-'"));
  }
  if (req->description().size() > 4096) {
    return Finish(ctx, absl::InvalidArgumentError("description: at most 4096 bytes"));
  }
  auto hex = RandomHex(4);
  if (!hex.ok()) return Finish(ctx, hex.status());
  ledger::SessionRow row;
  row.id = "y-" + *hex;
  row.kind = "study";
  row.title = req->name();
  row.opened_session_ns = hub_->UtcNowNanos();
  row.utc_anchor_ns = row.opened_session_ns;
  std::lock_guard<std::mutex> lock(StudyMutex());
  if (absl::Status s = hub_->ledger()->CreateSession(row); !s.ok()) return Finish(ctx, s);
  v1::StudyEvent e;
  e.set_event(v1::StudyEvent::KIND_CREATED);
  e.set_name(req->name());
  e.set_description(req->description());
  e.set_author("operator");
  absl::Status s = AppendAndLoad(hub_, row.id, std::move(e), resp);
  if (s.ok()) {
    TM_LOG(kInfo) << "study " << row.id << " created (" << req->name() << ")";
  }
  return Finish(ctx, s);
}

grpc::ServerUnaryReactor* AdminService::AddStudyCondition(grpc::CallbackServerContext* ctx,
                                                          const v1::AddStudyConditionRequest* req,
                                                          v1::Study* resp) {
  if (absl::Status s = NeedOperator(ctx, auth_); !s.ok()) return Finish(ctx, s);
  v1::StudyCondition condition;
  if (absl::Status s = CheckCondition(req->condition(), &condition); !s.ok()) {
    return Finish(ctx, s);
  }
  std::lock_guard<std::mutex> lock(StudyMutex());
  auto study = LoadStudy(hub_->ledger(), req->study_id());
  if (!study.ok()) return Finish(ctx, study.status());
  for (const auto& c : study->conditions()) {
    if (c.name() == condition.name()) {
      return Finish(ctx, absl::AlreadyExistsError(
                             Cat("study ", req->study_id(), " has a condition '", c.name(), "'")));
    }
  }
  if (study->has_schedule()) {
    return Finish(ctx, absl::FailedPreconditionError(
                           "the study's schedule is made; conditions cannot be added after it"));
  }
  v1::StudyEvent e;
  e.set_event(v1::StudyEvent::KIND_CONDITION);
  *e.mutable_condition() = condition;
  e.set_author("operator");
  return Finish(ctx, AppendAndLoad(hub_, req->study_id(), std::move(e), resp));
}

grpc::ServerUnaryReactor* AdminService::EnrollParticipants(grpc::CallbackServerContext* ctx,
                                                           const v1::EnrollParticipantsRequest* req,
                                                           v1::Study* resp) {
  if (absl::Status s = NeedOperator(ctx, auth_); !s.ok()) return Finish(ctx, s);
  if (req->participants().empty()) {
    return Finish(ctx, absl::InvalidArgumentError("name at least one participant pseudonym"));
  }
  std::lock_guard<std::mutex> lock(StudyMutex());
  auto study = LoadStudy(hub_->ledger(), req->study_id());
  if (!study.ok()) return Finish(ctx, study.status());
  std::set<std::string> have(study->participants().begin(), study->participants().end());
  for (const std::string& p : req->participants()) {
    if (!IsValidName(p)) {
      return Finish(ctx, absl::InvalidArgumentError(
                             Cat("participant '", p,
                                 "': a pseudonym of 1-64 letters, digits, '.', '_', ':' or '-' "
                                 "(never a real name)")));
    }
    if (!have.insert(p).second) {
      return Finish(ctx, absl::AlreadyExistsError(Cat("participant ", p, " is enrolled already")));
    }
  }
  v1::StudyEvent e;
  e.set_event(v1::StudyEvent::KIND_PARTICIPANTS);
  *e.mutable_participants() = req->participants();
  e.set_author("operator");
  return Finish(ctx, AppendAndLoad(hub_, req->study_id(), std::move(e), resp));
}

grpc::ServerUnaryReactor* AdminService::MakeStudySchedule(grpc::CallbackServerContext* ctx,
                                                          const v1::MakeStudyScheduleRequest* req,
                                                          v1::Study* resp) {
  if (absl::Status s = NeedOperator(ctx, auth_); !s.ok()) return Finish(ctx, s);
  const std::string design = req->design().empty() ? "williams" : req->design();
  if (design != "williams" && design != "latin") {
    return Finish(
        ctx, absl::InvalidArgumentError(Cat("design '", design, "': \"williams\" or \"latin\"")));
  }
  std::lock_guard<std::mutex> lock(StudyMutex());
  auto study = LoadStudy(hub_->ledger(), req->study_id());
  if (!study.ok()) return Finish(ctx, study.status());
  const int n = study->conditions_size();
  if (n < 2) {
    return Finish(ctx, absl::FailedPreconditionError(
                           "a schedule needs at least two conditions (add them first)"));
  }
  if (study->has_schedule()) {
    return Finish(ctx, absl::AlreadyExistsError("the study has a schedule already"));
  }
  auto rows = design == "williams" ? WilliamsDesign(n) : CyclicLatinSquare(n);
  v1::StudyEvent e;
  e.set_event(v1::StudyEvent::KIND_SCHEDULE);
  v1::StudySchedule* schedule = e.mutable_schedule();
  schedule->set_design(design);
  for (const auto& row : rows) {
    auto* out = schedule->add_rows();
    for (int i : row) out->add_conditions(study->conditions(i).name());
  }
  uint32_t i = 0;
  for (const std::string& p : study->participants()) {
    (*schedule->mutable_assignment())[p] = i++ % static_cast<uint32_t>(rows.size());
  }
  e.set_author("operator");
  return Finish(ctx, AppendAndLoad(hub_, req->study_id(), std::move(e), resp));
}

grpc::ServerUnaryReactor* AdminService::GetStudy(grpc::CallbackServerContext* ctx,
                                                 const v1::GetStudyRequest* req, v1::Study* resp) {
  if (absl::Status s = NeedOperator(ctx, auth_); !s.ok()) return Finish(ctx, s);
  auto study = LoadStudy(hub_->ledger(), req->study_id());
  if (!study.ok()) return Finish(ctx, study.status());
  *resp = std::move(*study);
  return Finish(ctx, absl::OkStatus());
}

grpc::ServerUnaryReactor* AdminService::ListStudies(grpc::CallbackServerContext* ctx,
                                                    const v1::ListStudiesRequest*,
                                                    v1::ListStudiesResponse* resp) {
  if (absl::Status s = NeedOperator(ctx, auth_); !s.ok()) return Finish(ctx, s);
  auto rows = hub_->ledger()->ListStudies();
  if (!rows.ok()) return Finish(ctx, rows.status());
  for (const auto& row : *rows) {
    auto study = LoadStudy(hub_->ledger(), row.id);
    if (!study.ok()) return Finish(ctx, study.status());
    *resp->add_studies() = std::move(*study);
  }
  return Finish(ctx, absl::OkStatus());
}

}  // namespace tickmark::rpc

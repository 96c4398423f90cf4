#include "server/ledger/sqlite/typed_tables.h"

#include <charconv>
#include <cmath>

#include "server/base/strings.h"
#include "server/ledger/ledger.h"
#include "server/ledger/sqlite/enum_names.h"
#include "server/ledger/sqlite/statement.h"

namespace tickmark::ledger {

using tickmark::v1::Record;

TypedTables::TypedTables(sqlite3* db) : db_(db) {}
TypedTables::~TypedTables() = default;

Statement& TypedTables::Prepared(const char* sql) {
  auto& s = cache_[sql];
  if (!s) s = std::make_unique<Statement>(db_, sql);
  return s->Reset();
}

absl::Status TypedTables::LabelPartsJson(const tickmark::v1::Label& label, std::string* json) {
  *json = "[]";
  for (const auto& part : label.parts()) {
    // Numbers go in as their shortest round-trip text (json() keeps a
    // number's text as given); SQLite's own REAL-to-JSON conversion prints
    // 15 digits, which does not round-trip a double. A non-finite number has
    // no JSON form and becomes null.
    auto number = [](double v, std::string* out) {
      if (!std::isfinite(v)) return false;
      char buf[32];
      auto r = std::to_chars(buf, buf + sizeof buf, v);
      out->assign(buf, r.ptr);
      return true;
    };
    std::string value, weight;
    Statement& q = Prepared(
        "SELECT json_insert(?1, '$[#]', json_object('trainer', ?2, 'value', json(?3), "
        "'weight', json(?4)))");  // SQLite docs: JSON functions, json_insert "$[#]" appends
    q.Bind(*json).Bind(part.trainer());
    if (number(part.value(), &value)) {
      q.Bind(value);
    } else {
      q.BindNull();
    }
    if (number(part.weight(), &weight)) {
      q.Bind(weight);
    } else {
      q.BindNull();
    }
    auto row = q.Step();
    if (!row.ok()) return row.status();
    if (!*row) return absl::InternalError("json_insert returned no row");
    *json = q.Text(0);
  }
  return absl::OkStatus();
}

absl::Status TypedTables::InsertDerived(std::string_view set, uint64_t seq, const Record& r) {
  const std::string& sid = r.session_id();
  switch (r.body_case()) {
    case Record::kCredit: {
      const auto& c = r.credit();
      return Prepared("INSERT INTO credit VALUES (?,?,?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(set).Bind(c.feedback_sequence()).Bind(c.step_sequence())
          .Bind(c.trainer()).Bind(c.agent()).Bind(c.step_id()).Bind(c.credit()).Bind(c.value())
          .Bind(c.weight()).Bind(c.kernel())
          .Run();
    }
    case Record::kLabel: {
      const auto& l = r.label();
      std::string parts;
      if (absl::Status s = LabelPartsJson(l, &parts); !s.ok()) return s;
      return Prepared("INSERT INTO label VALUES (?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(set).Bind(l.step_sequence()).Bind(l.agent())
          .Bind(l.step_id()).Bind(l.value()).Bind(l.weight()).Bind(parts)
          .Run();
    }
    case Record::kUnmatched: {
      const auto& u = r.unmatched();
      return Prepared("INSERT INTO unmatched VALUES (?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(set)
          .BindOptional(static_cast<int64_t>(u.feedback_sequence()))
          .Bind(u.trainer()).BindOptional(static_cast<int64_t>(u.step_sequence()))
          .Bind(u.agent()).Bind(u.reason())
          .Run();
    }
    default:
      return absl::InvalidArgumentError("a derived set holds credit, label and unmatched records");
  }
}

absl::Status TypedTables::Insert(const Record& r, const PersonalPart* personal) {
  const std::string& sid = r.session_id();
  const auto seq = r.sequence();
  auto body = CanonicalBody(r);
  if (!body.ok()) return body.status();
  auto key = ClientKeyOf(r);
  Statement& journal = Prepared(
      "INSERT INTO record (session_id, seq, kind, written_session_ns, client_id, client_seq, "
      "body, hash) VALUES (?, ?, ?, ?, ?, ?, ?, ?)");
  journal.Bind(sid).Bind(seq).Bind(RecordKindName(r)).Bind(r.written_session_ns());
  if (key) {
    journal.Bind(key->first).Bind(key->second);
  } else {
    journal.BindNull().BindNull();
  }
  if (absl::Status s = journal.BindBlob(*body).BindBlob(r.hash()).Run(); !s.ok()) return s;
  if (personal != nullptr) {
    absl::Status s = Prepared("INSERT INTO personal VALUES (?,?,?,?,?)")
                         .Bind(sid).Bind(seq).Bind(personal->participant)
                         .BindBlob(personal->salt).BindBlob(personal->content)
                         .Run();
    if (!s.ok()) return s;
  }

  switch (r.body_case()) {
    case Record::kFeedback: {
      const auto& f = r.feedback();
      return Prepared("INSERT INTO feedback VALUES (?,?,?,?,?,?,?,?,?,?,?,?,0)")
          .Bind(sid).Bind(seq).Bind(f.client_id()).Bind(f.client_sequence()).Bind(f.trainer())
          .Bind(f.value()).Bind(f.input()).Bind(f.event_source_ns()).Bind(f.arrival_session_ns())
          .Bind(f.event_session_ns()).Bind(f.uncertainty_ns()).Bind(f.late())
          .Run();
    }
    case Record::kStep: {
      const auto& s = r.step();
      return Prepared("INSERT INTO step VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(s.client_id()).Bind(s.client_sequence()).Bind(s.agent())
          .Bind(s.step_id()).Bind(s.episode()).Bind(s.action()).Bind(s.start_agent_ns())
          .BindOptional(s.end_agent_ns()).Bind(s.start_session_ns())
          .BindOptional(s.end_session_ns()).Bind(s.arrival_session_ns())
          .Bind(s.uncertainty_ns()).BindBlob(s.state()).Bind(s.features_size()).Bind(s.late())
          .Run();
    }
    case Record::kProbe: {
      const auto& p = r.probe();
      return Prepared("INSERT INTO probe VALUES (?,?,?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(p.client_id()).Bind(p.probe_id()).Bind(p.t1_session_ns())
          .Bind(p.t2_client_ns()).Bind(p.t3_client_ns()).Bind(p.t4_session_ns())
          .Bind(p.offset_ns()).Bind(p.delay_ns()).Bind(p.accepted()).Bind(p.reject_reason())
          .Run();
    }
    case Record::kClockModel: {
      const auto& m = r.clock_model();
      return Prepared("INSERT INTO clock_model VALUES (?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(m.client_id()).Bind(m.offset_ns()).Bind(m.drift_ppm())
          .Bind(m.reference_client_ns()).Bind(m.uncertainty_ns()).Bind(m.min_delay_ns())
          .Bind(static_cast<int64_t>(m.samples())).Bind(m.reason())
          .Run();
    }
    case Record::kMarker: {
      const auto& m = r.marker();
      return Prepared("INSERT INTO marker VALUES (?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(m.at_session_ns()).Bind(m.text()).Bind(m.author())
          .Run();
    }
    case Record::kClientEvent: {
      const auto& e = r.client_event();
      const auto& c = e.client();
      absl::Status s = Prepared("INSERT INTO client_event VALUES (?,?,?,?,?,?)")
                           .Bind(sid).Bind(seq).Bind(c.client_id())
                           .Bind(ClientEventWord(e.event()))
                           .Bind(e.detail()).Bind(r.written_session_ns())
                           .Run();
      if (!s.ok()) return s;
      return Prepared(
                 "INSERT INTO client VALUES (?,?,?,?,?,?,?,?,?,?) ON CONFLICT (session_id, "
                 "client_id) DO UPDATE SET last_seen_session_ns = excluded.last_seen_session_ns, "
                 "source_description = excluded.source_description, software = excluded.software")
          .Bind(sid).Bind(c.client_id()).Bind(RoleWord(c.role())).Bind(c.subject())
          .Bind(SourceKindWord(c.source_kind())).Bind(c.source_description()).Bind(c.software())
          .Bind(seq).Bind(r.written_session_ns()).Bind(r.written_session_ns())
          .Run();
    }
    case Record::kCredit:
    case Record::kLabel:
    case Record::kUnmatched:
      return InsertDerived("live", seq, r);
    case Record::kKernel: {
      const auto& k = r.kernel();
      return Prepared(
                 "INSERT INTO kernel_setting (session_id, seq, trainer, description, weight, "
                 "author, calibration) VALUES (?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(k.trainer()).Bind(k.description()).Bind(k.weight())
          .Bind(k.author()).Bind(k.calibration())
          .Run();
    }
    case Record::kCalibrationEvent: {
      const auto& e = r.calibration_event();
      return Prepared("INSERT INTO calibration_event VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,0)")
          .Bind(sid).Bind(seq).Bind(e.client_id()).Bind(e.client_sequence()).Bind(e.trainer())
          .Bind(e.run()).Bind(CalibrationEventWord(e.kind())).Bind(static_cast<int64_t>(e.move()))
          .Bind(e.at_source_ns()).Bind(e.approve()).Bind(e.practice()).Bind(e.detail())
          .Bind(e.at_session_ns()).Bind(e.uncertainty_ns()).Bind(e.arrival_session_ns())
          .Run();
    }
    case Record::kCalibration: {
      const auto& c = r.calibration();
      const bool has_chosen = c.chosen() < static_cast<uint32_t>(c.fits_size());
      const std::string family =
          has_chosen ? c.fits(static_cast<int>(c.chosen())).family() : std::string();
      return Prepared("INSERT INTO calibration VALUES (?,?,?,?,?,?,?,?,?,?)")
          .Bind(c.id()).Bind(c.trainer()).Bind(sid).Bind(seq).Bind(r.written_session_ns())
          .Bind(family).Bind(c.kernel_description()).Bind(static_cast<int64_t>(c.valid()))
          .Bind(c.warnings_size() > 0).Bind(SourceKindWord(c.source_kind()))
          .Run();
    }
    case Record::kSyncPulse: {
      const auto& p = r.sync_pulse();
      return Prepared("INSERT INTO sync_pulse VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(p.client_id()).Bind(p.client_sequence()).Bind(p.trainer())
          .Bind(SyncDirectionWord(p.direction())).Bind(p.line()).Bind(p.level())
          .Bind(p.event_source_ns()).Bind(p.source_uncertainty_ns()).Bind(p.event_session_ns())
          .Bind(p.uncertainty_ns()).Bind(p.arrival_session_ns()).Bind(SyncReasonWord(p.reason()))
          .Bind(p.pulse_index()).BindOptional(static_cast<int64_t>(p.marker_sequence()))
          .Bind(p.device()).Bind(p.simulated())
          .Run();
    }
    case Record::kErasure:
      return absl::OkStatus();  // the journal row is all it has
    case Record::kSessionEvent: {
      const auto& e = r.session_event();
      return Prepared("INSERT INTO session_event VALUES (?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(SessionEventWord(e.event()))
          .Bind(e.detail()).Bind(r.written_session_ns())
          .Run();
    }
    case Record::kStudy: {
      const auto& e = r.study();
      auto participants = JsonStringArray(
          db_, std::vector<std::string>(e.participants().begin(), e.participants().end()));
      if (!participants.ok()) return participants.status();
      std::string detail = e.description();
      if (e.has_condition()) {
        const auto& c = e.condition();
        detail = Cat("kernel=", c.default_kernel(), " pin_kernels=", c.pin_kernels() ? 1 : 0,
                     " allowed_lateness_ns=", c.allowed_lateness_ns(), " notes=", c.notes());
      } else if (e.has_schedule()) {
        detail = Cat("design=", e.schedule().design(), " rows=", e.schedule().rows_size());
      }
      std::string name = e.has_condition() ? e.condition().name() : e.name();
      return Prepared("INSERT INTO study_event VALUES (?,?,?,?,?,?,?,?)")
          .Bind(sid).Bind(seq).Bind(StudyEventWord(e.event())).Bind(name).Bind(*participants)
          .Bind(e.session_id()).Bind(detail).Bind(r.written_session_ns())
          .Run();
    }
    case Record::BODY_NOT_SET:
      break;
  }
  return absl::InvalidArgumentError("record has no body");
}

}  // namespace tickmark::ledger

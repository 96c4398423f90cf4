#include "server/ledger/ledger.h"

#include <openssl/evp.h>
#include <openssl/rand.h>

#include <memory>
#include <optional>

#include "server/base/sha256.h"
#include "server/base/strings.h"

#include <google/protobuf/io/coded_stream.h>
#include <google/protobuf/io/zero_copy_stream_impl_lite.h>

namespace tickmark::ledger {

using tickmark::v1::Record;

std::string_view RecordKindName(const Record& record) {
  switch (record.body_case()) {
    case Record::kSessionEvent: return "session_event";
    case Record::kClientEvent: return "client_event";
    case Record::kFeedback: return "feedback";
    case Record::kStep: return "step";
    case Record::kProbe: return "probe";
    case Record::kClockModel: return "clock_model";
    case Record::kMarker: return "marker";
    case Record::kCredit: return "credit";
    case Record::kLabel: return "label";
    case Record::kUnmatched: return "unmatched";
    case Record::kKernel: return "kernel";
    case Record::kCalibrationEvent: return "calibration_event";
    case Record::kCalibration: return "calibration";
    case Record::kSyncPulse: return "sync_pulse";
    case Record::kStudy: return "study";
    case Record::kErasure: return "erasure";
    case Record::BODY_NOT_SET: break;
  }
  return "unknown";
}

tickmark::v1::RecordKind RecordKindOf(const Record& record) {
  using namespace tickmark::v1;
  switch (record.body_case()) {
    case Record::kSessionEvent: return RECORD_KIND_SESSION_EVENT;
    case Record::kClientEvent: return RECORD_KIND_CLIENT_EVENT;
    case Record::kFeedback: return RECORD_KIND_FEEDBACK;
    case Record::kStep: return RECORD_KIND_STEP;
    case Record::kProbe: return RECORD_KIND_PROBE;
    case Record::kClockModel: return RECORD_KIND_CLOCK_MODEL;
    case Record::kMarker: return RECORD_KIND_MARKER;
    case Record::kCredit: return RECORD_KIND_CREDIT;
    case Record::kLabel: return RECORD_KIND_LABEL;
    case Record::kUnmatched: return RECORD_KIND_UNMATCHED;
    case Record::kKernel: return RECORD_KIND_KERNEL;
    case Record::kCalibrationEvent: return RECORD_KIND_CALIBRATION_EVENT;
    case Record::kCalibration: return RECORD_KIND_CALIBRATION;
    case Record::kSyncPulse: return RECORD_KIND_SYNC_PULSE;
    case Record::kStudy: return RECORD_KIND_STUDY;
    case Record::kErasure: return RECORD_KIND_ERASURE;
    case Record::BODY_NOT_SET: break;
  }
  return RECORD_KIND_UNSPECIFIED;
}

std::optional<std::pair<std::string, uint64_t>> ClientKeyOf(const Record& record) {
  if (record.has_feedback()) {
    return std::make_pair(record.feedback().client_id(), record.feedback().client_sequence());
  }
  if (record.has_step()) {
    return std::make_pair(record.step().client_id(), record.step().client_sequence());
  }
  if (record.has_calibration_event()) {
    return std::make_pair(record.calibration_event().client_id(),
                          record.calibration_event().client_sequence());
  }
  if (record.has_calibration()) {
    return std::make_pair(record.calibration().client_id(),
                          record.calibration().client_sequence());
  }
  if (record.has_sync_pulse()) {
    return std::make_pair(record.sync_pulse().client_id(), record.sync_pulse().client_sequence());
  }
  return std::nullopt;
}

namespace {

// Deterministic serialisation of any message (INTERNAL if it fails).
absl::StatusOr<std::string> Deterministic(const google::protobuf::MessageLite& message) {
  std::string bytes;
  bool ok = false;
  {
    google::protobuf::io::StringOutputStream raw(&bytes);
    google::protobuf::io::CodedOutputStream out(&raw);
    // Deterministic so that the same record always has the same bytes.
    out.SetSerializationDeterministic(true);
    ok = message.SerializeToCodedStream(&out) && !out.HadError();
  }
  if (!ok) return absl::InternalError("record does not serialise (too large?)");
  return bytes;
}

bool IsAnswer(const Record& record) {
  return record.has_calibration_event() &&
         record.calibration_event().kind() == tickmark::v1::CalibrationEvent::KIND_ANSWER;
}

// Clears the personal fields of a sealed record (the digest stays).
void ClearPersonal(Record* record) {
  if (record->has_feedback() && !record->feedback().personal_digest().empty()) {
    auto* f = record->mutable_feedback();
    f->clear_value();
    f->clear_input();
    f->clear_audio_sha256();
  } else if (IsAnswer(*record) && !record->calibration_event().personal_digest().empty()) {
    auto* e = record->mutable_calibration_event();
    e->clear_approve();
    e->clear_detail();
  }
}

}  // namespace

absl::StatusOr<std::string> CanonicalBody(const Record& record) {
  // A record being chained by Append (no hash yet) with no sealed personal
  // content is its own body: no copy (a whole-record copy per append showed
  // in the ingest profile).
  if (record.hash().empty() && PersonalDigestOf(record).empty()) return Deterministic(record);
  Record body = record;
  body.clear_hash();
  ClearPersonal(&body);
  return Deterministic(body);
}

std::string_view PersonalDigestOf(const Record& record) {
  if (record.has_feedback()) return record.feedback().personal_digest();
  if (record.has_calibration_event()) return record.calibration_event().personal_digest();
  return {};
}

absl::StatusOr<std::string> PersonalDigest(std::string_view salt, std::string_view content) {
  return Sha256(salt, content);
}

absl::StatusOr<std::optional<PersonalPart>> SealPersonal(Record* record) {
  tickmark::v1::PersonalContent content;
  PersonalPart part;
  if (record->has_feedback()) {
    const auto& f = record->feedback();
    if (!f.personal_digest().empty()) return std::nullopt;
    content.set_value(f.value());
    content.set_input(f.input());
    content.set_audio_sha256(f.audio_sha256());
    part.participant = f.trainer();
  } else if (IsAnswer(*record)) {
    const auto& e = record->calibration_event();
    if (!e.personal_digest().empty()) return std::nullopt;
    content.set_approve(e.approve());
    content.set_detail(e.detail());
    part.participant = e.trainer();
  } else {
    return std::nullopt;
  }
  auto bytes = Deterministic(content);
  if (!bytes.ok()) return bytes.status();
  part.content = std::move(*bytes);
  part.salt.resize(32);
  // OpenSSL docs, RAND_bytes(3): 1 on success; a CSPRNG seeded by the OS.
  if (RAND_bytes(reinterpret_cast<unsigned char*>(part.salt.data()), 32) != 1) {
    return absl::InternalError("no random salt for a personal digest (OpenSSL RAND_bytes)");
  }
  auto digest = Sha256(part.salt, part.content);
  if (!digest.ok()) return digest.status();
  if (record->has_feedback()) {
    record->mutable_feedback()->set_personal_digest(*digest);
  } else {
    record->mutable_calibration_event()->set_personal_digest(*digest);
  }
  return part;
}

absl::Status RestorePersonal(Record* record, std::string_view content) {
  tickmark::v1::PersonalContent c;
  if (!c.ParseFromArray(content.data(), static_cast<int>(content.size()))) {
    return absl::DataLossError(
        Cat("personal content of record ", record->sequence(), " does not parse"));
  }
  if (record->has_feedback()) {
    auto* f = record->mutable_feedback();
    f->set_value(c.value());
    f->set_input(c.input());
    f->set_audio_sha256(c.audio_sha256());
  } else if (record->has_calibration_event()) {
    auto* e = record->mutable_calibration_event();
    e->set_approve(c.approve());
    e->set_detail(c.detail());
  }
  return absl::OkStatus();
}

absl::StatusOr<std::string> ChainHash(std::string_view prev_hash, const Record& record) {
  auto bytes = CanonicalBody(record);
  if (!bytes.ok()) return bytes.status();
  return Sha256(prev_hash, *bytes);
}

absl::Status Ledger::PutTimeSet(const TimeSetRow&, const std::vector<DerivedTimeRow>&) {
  return absl::UnimplementedError("this ledger keeps no time sets");
}

absl::StatusOr<std::vector<TimeSetRow>> Ledger::ListTimeSets(std::string_view) {
  return absl::UnimplementedError("this ledger keeps no time sets");
}

absl::StatusOr<TimeSetRow> Ledger::GetTimeSet(std::string_view) {
  return absl::UnimplementedError("this ledger keeps no time sets");
}

absl::StatusOr<std::vector<DerivedTimeRow>> Ledger::ReadDerivedTimes(std::string_view) {
  return absl::UnimplementedError("this ledger keeps no time sets");
}

absl::StatusOr<std::vector<SessionRow>> Ledger::ListStudies() {
  return absl::UnimplementedError("this ledger keeps no studies");
}

absl::StatusOr<SessionRow> Ledger::GetStudy(std::string_view) {
  return absl::UnimplementedError("this ledger keeps no studies");
}

absl::Status Ledger::PutReceipt(const tickmark::v1::Receipt&, std::string_view) {
  return absl::UnimplementedError("this ledger keeps no receipts");
}

absl::StatusOr<std::optional<tickmark::v1::Receipt>> Ledger::GetReceipt(std::string_view) {
  return absl::UnimplementedError("this ledger keeps no receipts");
}

absl::StatusOr<std::vector<PersonalHolding>> Ledger::FindPersonalContent(std::string_view) {
  return absl::UnimplementedError("this ledger cannot erase participants");
}

absl::Status Ledger::ErasePersonalContent(std::string_view, const std::vector<std::string>&) {
  return absl::UnimplementedError("this ledger cannot erase participants");
}

}  // namespace tickmark::ledger

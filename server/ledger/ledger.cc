#include "server/ledger/ledger.h"

#include <openssl/evp.h>

#include <memory>
#include <optional>

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

absl::StatusOr<std::string> CanonicalBody(const Record& record) {
  // A record without a hash (every record being chained by Append) is its
  // own body: no copy (a whole-record copy per append was measurable).
  std::optional<Record> copy;
  if (!record.hash().empty()) {
    copy.emplace(record);
    copy->clear_hash();
  }
  const Record& body = copy ? *copy : record;
  std::string bytes;
  bool ok = false;
  {
    google::protobuf::io::StringOutputStream raw(&bytes);
    google::protobuf::io::CodedOutputStream out(&raw);
    // Deterministic so that the same record always has the same bytes.
    out.SetSerializationDeterministic(true);
    ok = body.SerializeToCodedStream(&out) && !out.HadError();
  }
  if (!ok) return absl::InternalError("record does not serialise (too large?)");
  return bytes;
}

absl::StatusOr<std::string> ChainHash(std::string_view prev_hash, const Record& record) {
  auto bytes = CanonicalBody(record);
  if (!bytes.ok()) return bytes.status();
  unsigned char digest[EVP_MAX_MD_SIZE];
  unsigned int len = 0;
  std::unique_ptr<EVP_MD_CTX, decltype(&EVP_MD_CTX_free)> ctx(EVP_MD_CTX_new(), &EVP_MD_CTX_free);
  // OpenSSL docs, EVP_DigestInit(3): these return 1 for success, 0 for failure.
  if (ctx == nullptr || EVP_DigestInit_ex(ctx.get(), EVP_sha256(), nullptr) != 1 ||
      EVP_DigestUpdate(ctx.get(), prev_hash.data(), prev_hash.size()) != 1 ||
      EVP_DigestUpdate(ctx.get(), bytes->data(), bytes->size()) != 1 ||
      EVP_DigestFinal_ex(ctx.get(), digest, &len) != 1 || len != 32) {
    return absl::InternalError("SHA-256 of a ledger record failed (OpenSSL EVP)");
  }
  return std::string(reinterpret_cast<char*>(digest), len);
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

}  // namespace tickmark::ledger

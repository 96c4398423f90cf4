#include "server/ledger/ledger.h"

#include <openssl/evp.h>

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
  return std::nullopt;
}

std::string CanonicalBody(const Record& record) {
  Record body = record;
  body.clear_hash();
  std::string bytes;
  {
    google::protobuf::io::StringOutputStream raw(&bytes);
    google::protobuf::io::CodedOutputStream out(&raw);
    // Deterministic so that the same record always has the same bytes.
    out.SetSerializationDeterministic(true);
    body.SerializeToCodedStream(&out);
  }
  return bytes;
}

std::string ChainHash(std::string_view prev_hash, const Record& record) {
  const std::string bytes = CanonicalBody(record);
  unsigned char digest[EVP_MAX_MD_SIZE];
  unsigned int len = 0;
  EVP_MD_CTX* ctx = EVP_MD_CTX_new();
  EVP_DigestInit_ex(ctx, EVP_sha256(), nullptr);
  EVP_DigestUpdate(ctx, prev_hash.data(), prev_hash.size());
  EVP_DigestUpdate(ctx, bytes.data(), bytes.size());
  EVP_DigestFinal_ex(ctx, digest, &len);
  EVP_MD_CTX_free(ctx);
  return std::string(reinterpret_cast<char*>(digest), len);
}

}  // namespace tickmark::ledger

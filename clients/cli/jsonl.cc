#include "clients/cli/jsonl.h"

#include <charconv>
#include <cmath>
#include <cstdio>

#include "absl/strings/escaping.h"
#include <google/protobuf/descriptor.h>
#include <google/protobuf/reflection.h>

namespace tickmark::cli {
namespace {

using google::protobuf::FieldDescriptor;
using google::protobuf::Message;
using google::protobuf::Reflection;

void AppendString(std::string* out, const std::string& s) {
  *out += '"';
  for (unsigned char c : s) {
    switch (c) {
      case '"': *out += "\\\""; break;
      case '\\': *out += "\\\\"; break;
      case '\n': *out += "\\n"; break;
      case '\r': *out += "\\r"; break;
      case '\t': *out += "\\t"; break;
      default:
        if (c < 0x20) {
          char buf[8];
          std::snprintf(buf, sizeof buf, "\\u%04x", c);
          *out += buf;
        } else {
          *out += static_cast<char>(c);
        }
    }
  }
  *out += '"';
}

// The shortest text that reads back as the same value of its own type
// (std::to_chars without a precision), so a float 0.1f is written 0.1, not
// 0.10000000149011612 (its value widened to double).
template <typename T>
void AppendNumber(std::string* out, T v) {
  if (!std::isfinite(v)) {
    *out += "null";  // JSON has no NaN/Inf; the server never stores them
    return;
  }
  char buf[64];
  auto [end, ec] = std::to_chars(buf, buf + sizeof buf, v);
  out->append(buf, end);
}

std::string EnumName(const google::protobuf::EnumValueDescriptor* v) {
  // "ROLE_TRAINER" -> "trainer", "KIND_CONNECTED" -> "connected".
  std::string name = v->name();
  const std::string& type = v->type()->name();
  std::string prefix;
  for (char c : type) {
    if (std::isupper(static_cast<unsigned char>(c)) && !prefix.empty()) prefix += '_';
    prefix += static_cast<char>(std::toupper(static_cast<unsigned char>(c)));
  }
  prefix += '_';
  if (name.rfind(prefix, 0) == 0) {
    name = name.substr(prefix.size());
  } else if (name.rfind("KIND_", 0) == 0) {
    name = name.substr(5);
  }
  for (char& c : name) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return name;
}

void AppendMessage(std::string* out, const Message& m);

void AppendValue(std::string* out, const Message& m, const Reflection* r, const FieldDescriptor* f,
                 int index) {
  const bool rep = index >= 0;
  switch (f->cpp_type()) {
    case FieldDescriptor::CPPTYPE_INT32:
      *out += std::to_string(rep ? r->GetRepeatedInt32(m, f, index) : r->GetInt32(m, f));
      break;
    case FieldDescriptor::CPPTYPE_INT64:
      *out += std::to_string(rep ? r->GetRepeatedInt64(m, f, index) : r->GetInt64(m, f));
      break;
    case FieldDescriptor::CPPTYPE_UINT32:
      *out += std::to_string(rep ? r->GetRepeatedUInt32(m, f, index) : r->GetUInt32(m, f));
      break;
    case FieldDescriptor::CPPTYPE_UINT64:
      *out += std::to_string(rep ? r->GetRepeatedUInt64(m, f, index) : r->GetUInt64(m, f));
      break;
    case FieldDescriptor::CPPTYPE_DOUBLE:
      AppendNumber(out, rep ? r->GetRepeatedDouble(m, f, index) : r->GetDouble(m, f));
      break;
    case FieldDescriptor::CPPTYPE_FLOAT:
      AppendNumber(out, rep ? r->GetRepeatedFloat(m, f, index) : r->GetFloat(m, f));
      break;
    case FieldDescriptor::CPPTYPE_BOOL:
      *out += (rep ? r->GetRepeatedBool(m, f, index) : r->GetBool(m, f)) ? "true" : "false";
      break;
    case FieldDescriptor::CPPTYPE_ENUM:
      AppendString(out, EnumName(rep ? r->GetRepeatedEnum(m, f, index) : r->GetEnum(m, f)));
      break;
    case FieldDescriptor::CPPTYPE_STRING: {
      std::string s = rep ? r->GetRepeatedString(m, f, index) : r->GetString(m, f);
      AppendString(out, f->type() == FieldDescriptor::TYPE_BYTES ? absl::Base64Escape(s) : s);
      break;
    }
    case FieldDescriptor::CPPTYPE_MESSAGE:
      AppendMessage(out, rep ? r->GetRepeatedMessage(m, f, index) : r->GetMessage(m, f));
      break;
  }
}

// Writes the fields of m as `"name":value` pairs (no braces), every field
// including defaults, so every line of one kind has the same columns; of a
// oneof only the member in force is written (a kernel setting names one
// kernel, not every kind with zeros).
void AppendFields(std::string* out, const Message& m, bool* first) {
  const Reflection* r = m.GetReflection();
  const auto* d = m.GetDescriptor();
  for (int i = 0; i < d->field_count(); ++i) {
    const FieldDescriptor* f = d->field(i);
    if (f->real_containing_oneof() != nullptr && !r->HasField(m, f)) continue;
    if (!*first) *out += ',';
    *first = false;
    AppendString(out, f->name());
    *out += ':';
    if (f->is_repeated()) {
      *out += '[';
      for (int j = 0; j < r->FieldSize(m, f); ++j) {
        if (j) *out += ',';
        AppendValue(out, m, r, f, j);
      }
      *out += ']';
    } else {
      AppendValue(out, m, r, f, -1);
    }
  }
}

void AppendMessage(std::string* out, const Message& m) {
  *out += '{';
  bool first = true;
  AppendFields(out, m, &first);
  *out += '}';
}

}  // namespace

int64_t RecordSessionNs(const tickmark::v1::Record& r) {
  switch (r.body_case()) {
    case tickmark::v1::Record::kFeedback: return r.feedback().event_session_ns();
    case tickmark::v1::Record::kStep: return r.step().start_session_ns();
    case tickmark::v1::Record::kProbe: return r.probe().t4_session_ns();
    case tickmark::v1::Record::kMarker: return r.marker().at_session_ns();
    case tickmark::v1::Record::kSyncPulse: return r.sync_pulse().event_session_ns();
    default: return r.written_session_ns();
  }
}

std::string RecordToJsonLine(const tickmark::v1::Record& record) {
  std::string out = "{\"session_id\":";
  AppendString(&out, record.session_id());
  out += ",\"seq\":" + std::to_string(record.sequence());
  // The kind is the name of the body's oneof field.
  const auto* oneof = record.GetDescriptor()->FindOneofByName("body");
  const FieldDescriptor* body =
      record.GetReflection()->GetOneofFieldDescriptor(record, oneof);
  out += ",\"kind\":";
  AppendString(&out, body ? body->name() : "unknown");
  out += ",\"session_ns\":" + std::to_string(RecordSessionNs(record));
  out += ",\"written_session_ns\":" + std::to_string(record.written_session_ns());
  out += ",\"hash\":";
  AppendString(&out, absl::BytesToHexString(record.hash()));
  if (body != nullptr) {
    bool first = true;
    out += ',';
    size_t before = out.size();
    AppendFields(&out, record.GetReflection()->GetMessage(record, body), &first);
    if (out.size() == before) out.pop_back();  // body without fields
  }
  out += '}';
  return out;
}

}  // namespace tickmark::cli

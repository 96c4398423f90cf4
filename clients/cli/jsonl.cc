#include "clients/cli/jsonl.h"

#include <cmath>
#include <cstdio>

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

void AppendDouble(std::string* out, double v) {
  if (!std::isfinite(v)) {
    *out += "null";  // JSON has no NaN/Inf; the server never stores them
    return;
  }
  char buf[32];
  std::snprintf(buf, sizeof buf, "%.17g", v);
  *out += buf;
}

std::string Base64(const std::string& in) {
  static constexpr char kAlphabet[] =
      "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
  std::string out;
  size_t i = 0;
  for (; i + 2 < in.size(); i += 3) {
    uint32_t n = (uint32_t(uint8_t(in[i])) << 16) | (uint32_t(uint8_t(in[i + 1])) << 8) |
                 uint8_t(in[i + 2]);
    out += kAlphabet[n >> 18];
    out += kAlphabet[(n >> 12) & 63];
    out += kAlphabet[(n >> 6) & 63];
    out += kAlphabet[n & 63];
  }
  if (i + 1 == in.size()) {
    uint32_t n = uint32_t(uint8_t(in[i])) << 16;
    out += kAlphabet[n >> 18];
    out += kAlphabet[(n >> 12) & 63];
    out += "==";
  } else if (i + 2 == in.size()) {
    uint32_t n = (uint32_t(uint8_t(in[i])) << 16) | (uint32_t(uint8_t(in[i + 1])) << 8);
    out += kAlphabet[n >> 18];
    out += kAlphabet[(n >> 12) & 63];
    out += kAlphabet[(n >> 6) & 63];
    out += '=';
  }
  return out;
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
      AppendDouble(out, rep ? r->GetRepeatedDouble(m, f, index) : r->GetDouble(m, f));
      break;
    case FieldDescriptor::CPPTYPE_FLOAT:
      AppendDouble(out, rep ? r->GetRepeatedFloat(m, f, index) : r->GetFloat(m, f));
      break;
    case FieldDescriptor::CPPTYPE_BOOL:
      *out += (rep ? r->GetRepeatedBool(m, f, index) : r->GetBool(m, f)) ? "true" : "false";
      break;
    case FieldDescriptor::CPPTYPE_ENUM:
      AppendString(out, EnumName(rep ? r->GetRepeatedEnum(m, f, index) : r->GetEnum(m, f)));
      break;
    case FieldDescriptor::CPPTYPE_STRING: {
      std::string s = rep ? r->GetRepeatedString(m, f, index) : r->GetString(m, f);
      AppendString(out, f->type() == FieldDescriptor::TYPE_BYTES ? Base64(s) : s);
      break;
    }
    case FieldDescriptor::CPPTYPE_MESSAGE:
      AppendMessage(out, rep ? r->GetRepeatedMessage(m, f, index) : r->GetMessage(m, f));
      break;
  }
}

// Writes the fields of m as `"name":value` pairs (no braces), every field
// including defaults, so every line of one kind has the same columns.
void AppendFields(std::string* out, const Message& m, bool* first) {
  const Reflection* r = m.GetReflection();
  const auto* d = m.GetDescriptor();
  for (int i = 0; i < d->field_count(); ++i) {
    const FieldDescriptor* f = d->field(i);
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

std::string Hex(const std::string& bytes) {
  static constexpr char kHex[] = "0123456789abcdef";
  std::string out;
  for (unsigned char c : bytes) {
    out += kHex[c >> 4];
    out += kHex[c & 15];
  }
  return out;
}

}  // namespace

int64_t RecordSessionNs(const tickmark::v1::Record& r) {
  switch (r.body_case()) {
    case tickmark::v1::Record::kFeedback: return r.feedback().event_session_ns();
    case tickmark::v1::Record::kStep: return r.step().start_session_ns();
    case tickmark::v1::Record::kProbe: return r.probe().t4_session_ns();
    case tickmark::v1::Record::kMarker: return r.marker().at_session_ns();
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
  AppendString(&out, Hex(record.hash()));
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

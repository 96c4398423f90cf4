#include "server/web/page_messages.h"

#include <google/protobuf/struct.pb.h>
#include <google/protobuf/util/json_util.h>

#include <charconv>

#include "server/base/strings.h"

namespace tickmark::web {
namespace {

namespace pb = google::protobuf;
namespace v1 = tickmark::v1;

constexpr char kSoftware[] = "tickmark-web/0.1";

// {"<key>": <json of message>}.
std::string Wrap(std::string_view key, const pb::Message& message, bool defaults) {
  pb::util::JsonPrintOptions options;
  options.always_print_primitive_fields = defaults;
  std::string inner;
  if (!pb::util::MessageToJsonString(message, &inner, options).ok()) inner = "{}";
  return Cat("{\"", key, "\":", inner, "}");
}

// RFC 8259 §7: control characters are escaped inside strings, and only
// tab, line feed and carriage return may stand between tokens (§2).
// protobuf's parser lets a raw NUL through into a string; refuse them all.
bool HasRawControl(std::string_view json) {
  for (char c : json) {
    if (static_cast<unsigned char>(c) < 0x20 && c != '\t' && c != '\n' && c != '\r') return true;
  }
  return false;
}

}  // namespace

absl::StatusOr<v1::TrainerMessage> ParseTrainerPageMessage(std::string_view json) {
  if (json.size() > kMaxPageMessageBytes) {
    return absl::InvalidArgumentError(Cat("message larger than ", kMaxPageMessageBytes, " bytes"));
  }
  if (HasRawControl(json)) return absl::InvalidArgumentError("a raw control character in JSON");
  v1::TrainerMessage m;
  pb::util::JsonParseOptions options;  // unknown fields are errors
  if (auto s = pb::util::JsonStringToMessage(std::string(json), &m, options); !s.ok()) {
    return absl::InvalidArgumentError(
        Cat("not a TrainerMessage in the JSON mapping: ", std::string(s.message())));
  }
  if (m.body_case() == v1::TrainerMessage::BODY_NOT_SET) {
    return absl::InvalidArgumentError("a message with no body");
  }
  return m;
}

void StampHello(v1::Hello* hello, std::string_view user_agent) {
  hello->set_source_kind(v1::SOURCE_KIND_WEB);
  std::string ua;
  for (char c : user_agent.substr(0, 160)) ua.push_back(c >= 0x20 && c < 0x7f ? c : '?');
  hello->set_source_description(ua.empty() ? "web page" : Cat("web page: ", ua));
  hello->set_software(kSoftware);
}

std::string ServerMessageToPage(const v1::ServerMessage& message) {
  if (message.has_welcome()) {
    v1::ServerMessage copy = message;
    copy.mutable_welcome()->clear_udp_probe_port();
    copy.mutable_welcome()->clear_udp_probe_tag();
    copy.mutable_welcome()->clear_udp_probe_key();
    pb::util::JsonPrintOptions options;
    options.always_print_primitive_fields = true;
    std::string out;
    if (!pb::util::MessageToJsonString(copy, &out, options).ok()) return "{}";
    return out;
  }
  pb::util::JsonPrintOptions options;
  options.always_print_primitive_fields = true;
  std::string out;
  if (!pb::util::MessageToJsonString(message, &out, options).ok()) return "{}";
  return out;
}

std::string ClockToPage(const v1::ClockModelUpdate& model) { return Wrap("clock", model, true); }

std::string EndToPage(int code, std::string_view message) {
  // Written out, not as a Struct, so the fields keep their order.
  pb::Value text;
  text.set_string_value(std::string(message));
  std::string quoted;
  if (!pb::util::MessageToJsonString(text, &quoted).ok()) quoted = "\"\"";
  return Cat("{\"end\":{\"code\":", code, ",\"message\":", quoted, "}}");
}

absl::StatusOr<SubscribePageRequest> ParseSubscribePageMessage(std::string_view json) {
  if (json.size() > kMaxPageMessageBytes) {
    return absl::InvalidArgumentError(Cat("message larger than ", kMaxPageMessageBytes, " bytes"));
  }
  if (HasRawControl(json)) return absl::InvalidArgumentError("a raw control character in JSON");
  pb::Struct in;
  if (!pb::util::JsonStringToMessage(std::string(json), &in).ok() ||
      in.fields().count("subscribe") == 0 || !in.fields().at("subscribe").has_struct_value()) {
    return absl::InvalidArgumentError("expected {\"subscribe\": {...}}");
  }
  const auto& f = in.fields().at("subscribe").struct_value().fields();
  SubscribePageRequest r;
  auto text = [&f](const char* key) -> std::string {
    auto it = f.find(key);
    return it != f.end() && it->second.has_string_value() ? it->second.string_value() : "";
  };
  r.token = text("token");
  r.session_id = text("sessionId");
  if (r.token.empty() || r.session_id.empty()) {
    return absl::InvalidArgumentError("subscribe needs a token and a sessionId");
  }
  if (auto it = f.find("fromSequence"); it != f.end()) {
    // A string (the JSON mapping of uint64) or a whole number.
    if (it->second.has_string_value()) {
      const std::string& s = it->second.string_value();
      auto [end, ec] = std::from_chars(s.data(), s.data() + s.size(), r.from_sequence);
      if (ec != std::errc() || end != s.data() + s.size()) {
        return absl::InvalidArgumentError("fromSequence is not a whole number");
      }
    } else if (it->second.has_number_value()) {
      const double d = it->second.number_value();
      if (!(d >= 0 && d <= 9e15) || d != static_cast<double>(static_cast<uint64_t>(d))) {
        return absl::InvalidArgumentError("fromSequence is not a whole number");
      }
      r.from_sequence = static_cast<uint64_t>(d);
    } else {
      return absl::InvalidArgumentError("fromSequence is not a whole number");
    }
  }
  return r;
}

std::string RecordToPage(const v1::Record& record) {
  v1::Record slim = record;
  slim.clear_hash();
  if (slim.has_step()) {
    slim.mutable_step()->clear_state();
    slim.mutable_step()->clear_features();
  }
  if (slim.has_calibration()) {
    // The full fit is long; the live view shows the kernel chosen.
    v1::Calibration* c = slim.mutable_calibration();
    c->clear_matches();
    c->clear_delays_s();
    c->clear_fits();
  }
  return Wrap("record", slim, false);
}

std::string SummaryToPage(const v1::SessionSummary& summary) {
  return Wrap("summary", summary, false);
}

}  // namespace tickmark::web

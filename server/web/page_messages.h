// The messages between the pages and the bridges, as JSON text on the
// WebSocket (docs/web.md, "What travels on the socket"). Pure functions, no
// I/O, tested by feeding text (docs/conventions.md habit 4).
//
// Trainer page (/ws/train): the page sends tickmark.v1.TrainerMessage in
// protobuf's JSON mapping — {"hello": {...}} first, then {"feedback": ...},
// {"probeReply": ...} and {"calibration": ...}; it receives
// tickmark.v1.ServerMessage the same way ({"welcome": ...}, {"ack": ...},
// {"probe": ...}, {"calibration": ...}) and two messages of the bridge's
// own: {"clock": ClockModelUpdate} when the server's model of the page's
// clock changes, and {"end": {"code": N, "message": "..."}} when the stream
// ended (N a gRPC status code).
//
// Live view (/ws/live): the page sends {"subscribe": {"token": "...",
// "sessionId": "...", "fromSequence": "N"}} once; it receives
// {"summary": SessionSummary}, then {"record": Record} for each record in
// sequence order (step state, features and the hash left out), and
// {"end": ...} as above.
//
// Times stay int64 nanoseconds; the JSON mapping writes them as strings.
#ifndef TICKMARK_SERVER_WEB_PAGE_MESSAGES_H_
#define TICKMARK_SERVER_WEB_PAGE_MESSAGES_H_

#include <string>
#include <string_view>

#include "absl/status/statusor.h"
#include "tickmark/v1/admin.pb.h"
#include "tickmark/v1/stream.pb.h"

namespace tickmark::web {

// Largest message a page may send (a calibration finish is the largest).
inline constexpr size_t kMaxPageMessageBytes = 16 * 1024;

// A trainer page's message. INVALID_ARGUMENT (naming what is wrong) when it
// is not a TrainerMessage in the JSON mapping or sets no body.
absl::StatusOr<tickmark::v1::TrainerMessage> ParseTrainerPageMessage(std::string_view json);

// Fills in what the bridge, not the page, vouches for in a hello: the source
// kind (web), the description (from the browser's User-Agent, shortened)
// and the software (the bridge's name and version).
void StampHello(tickmark::v1::Hello* hello, std::string_view user_agent);

// A server message for the page; the Welcome's UDP probe fields are left out
// (a page cannot send datagrams, and the key is not the page's business).
std::string ServerMessageToPage(const tickmark::v1::ServerMessage& message);
std::string ClockToPage(const tickmark::v1::ClockModelUpdate& model);
std::string EndToPage(int code, std::string_view message);

struct SubscribePageRequest {
  std::string token;
  std::string session_id;
  uint64_t from_sequence = 0;
};
absl::StatusOr<SubscribePageRequest> ParseSubscribePageMessage(std::string_view json);
std::string RecordToPage(const tickmark::v1::Record& record);
std::string SummaryToPage(const tickmark::v1::SessionSummary& summary);

}  // namespace tickmark::web

#endif  // TICKMARK_SERVER_WEB_PAGE_MESSAGES_H_

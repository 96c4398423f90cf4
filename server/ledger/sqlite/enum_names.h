// The words the typed tables store for proto enums: the generated enum name
// without its prefix, in lower case (ROLE_TRAINER -> "trainer",
// SOURCE_KIND_INPUT_DEVICE -> "input_device", ClientEvent KIND_CONNECTED ->
// "connected"). Built on the generated *_Name/*_Parse functions so that a
// new enum value needs no edit here. Pure functions; thread-safe.
#ifndef TICKMARK_SERVER_LEDGER_SQLITE_ENUM_NAMES_H_
#define TICKMARK_SERVER_LEDGER_SQLITE_ENUM_NAMES_H_

#include <string>
#include <string_view>

#include "tickmark/v1/records.pb.h"

namespace tickmark::ledger {

std::string RoleWord(tickmark::v1::Role role);
// ROLE_UNSPECIFIED for a word that names no role.
tickmark::v1::Role RoleFromWord(std::string_view word);
std::string SourceKindWord(tickmark::v1::SourceKind kind);
// SOURCE_KIND_UNSPECIFIED for a word that names no source kind.
tickmark::v1::SourceKind SourceKindFromWord(std::string_view word);
// "move", "answer".
std::string CalibrationEventWord(tickmark::v1::CalibrationEvent::Kind kind);
std::string ClientEventWord(tickmark::v1::ClientEvent::Kind kind);
std::string SessionEventWord(tickmark::v1::SessionEvent::Kind kind);
// "out", "in"; "interval", "marker", "external".
std::string SyncDirectionWord(tickmark::v1::SyncDirection direction);
std::string SyncReasonWord(tickmark::v1::SyncReason reason);
// "created", "condition", "participants", "schedule", "session".
std::string StudyEventWord(tickmark::v1::StudyEvent::Kind kind);

}  // namespace tickmark::ledger

#endif  // TICKMARK_SERVER_LEDGER_SQLITE_ENUM_NAMES_H_

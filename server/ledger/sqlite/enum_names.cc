#include "server/ledger/sqlite/enum_names.h"

#include <cctype>

namespace tickmark::ledger {
namespace {

std::string Word(const std::string& generated, std::string_view prefix) {
  std::string n = generated;
  if (n.rfind(prefix, 0) == 0) n = n.substr(prefix.size());
  for (char& c : n) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return n;
}

}  // namespace

std::string RoleWord(tickmark::v1::Role role) {
  return Word(tickmark::v1::Role_Name(role), "ROLE_");
}

tickmark::v1::Role RoleFromWord(std::string_view word) {
  std::string name = "ROLE_";
  for (char c : word) name += static_cast<char>(std::toupper(static_cast<unsigned char>(c)));
  tickmark::v1::Role role = tickmark::v1::ROLE_UNSPECIFIED;
  if (!tickmark::v1::Role_Parse(name, &role)) return tickmark::v1::ROLE_UNSPECIFIED;
  return role;
}

std::string SourceKindWord(tickmark::v1::SourceKind kind) {
  return Word(tickmark::v1::SourceKind_Name(kind), "SOURCE_KIND_");
}

tickmark::v1::SourceKind SourceKindFromWord(std::string_view word) {
  std::string name = "SOURCE_KIND_";
  for (char c : word) name += static_cast<char>(std::toupper(static_cast<unsigned char>(c)));
  tickmark::v1::SourceKind kind = tickmark::v1::SOURCE_KIND_UNSPECIFIED;
  if (!tickmark::v1::SourceKind_Parse(name, &kind)) return tickmark::v1::SOURCE_KIND_UNSPECIFIED;
  return kind;
}

std::string CalibrationEventWord(tickmark::v1::CalibrationEvent::Kind kind) {
  return Word(tickmark::v1::CalibrationEvent::Kind_Name(kind), "KIND_");
}

std::string ClientEventWord(tickmark::v1::ClientEvent::Kind kind) {
  return Word(tickmark::v1::ClientEvent::Kind_Name(kind), "KIND_");
}

std::string SessionEventWord(tickmark::v1::SessionEvent::Kind kind) {
  return Word(tickmark::v1::SessionEvent::Kind_Name(kind), "KIND_");
}

std::string SyncDirectionWord(tickmark::v1::SyncDirection direction) {
  return Word(tickmark::v1::SyncDirection_Name(direction), "SYNC_DIRECTION_");
}

std::string SyncReasonWord(tickmark::v1::SyncReason reason) {
  return Word(tickmark::v1::SyncReason_Name(reason), "SYNC_REASON_");
}

std::string StudyEventWord(tickmark::v1::StudyEvent::Kind kind) {
  return Word(tickmark::v1::StudyEvent::Kind_Name(kind), "KIND_");
}

}  // namespace tickmark::ledger

// A study's journal (docs/studies.md): the StudyEvent records of one study,
// appended and hash-chained by the ledger exactly as a session's records,
// keyed by the study id ("y-7f3a2c91") instead of a session id. The study's
// current state (conditions, participants, schedule, sessions) is the fold
// of its journal, so nothing about a study lives outside its chain but the
// `session` row of kind "study" that names it.
#ifndef TICKMARK_SERVER_RPC_STUDY_JOURNAL_H_
#define TICKMARK_SERVER_RPC_STUDY_JOURNAL_H_

#include <mutex>
#include <string>

#include "absl/status/statusor.h"
#include "server/ledger/ledger.h"
#include "tickmark/v1/admin.pb.h"

namespace tickmark::rpc {

// Reads a study's whole journal and folds it: NOT_FOUND for an unknown id.
// Participants enrolled after a schedule was made take its rows round robin,
// continuing from the participants it assigned.
absl::StatusOr<tickmark::v1::Study> LoadStudy(ledger::Ledger* ledger, const std::string& id);

// Folds one record into `study` (exposed for tests).
void FoldStudyRecord(const tickmark::v1::Record& record, tickmark::v1::Study* study);

// Appends one StudyEvent to the journal, written at `written_session_ns`
// (UTC ns), and waits for its commit; returns the record as committed.
absl::StatusOr<tickmark::v1::Record> AppendStudyEvent(ledger::Ledger* ledger,
                                                      const std::string& study_id,
                                                      tickmark::v1::StudyEvent event,
                                                      int64_t written_session_ns);

// Held across read-check-append of a study change, so two concurrent calls
// cannot both add the same condition or participant.
std::mutex& StudyMutex();

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_STUDY_JOURNAL_H_

#include "server/rpc/study_journal.h"

#include <future>

#include "server/base/strings.h"

namespace tickmark::rpc {

namespace v1 = tickmark::v1;

std::mutex& StudyMutex() {
  static std::mutex mu;
  return mu;
}

namespace {

// Gives unassigned participants schedule rows round robin, continuing after
// the highest row index used so far in enrolment order.
void AssignRows(v1::Study* study) {
  if (!study->has_schedule() || study->schedule().rows_size() == 0) return;
  auto* schedule = study->mutable_schedule();
  const uint32_t rows = static_cast<uint32_t>(schedule->rows_size());
  uint32_t next = 0;
  for (const std::string& p : study->participants()) {
    auto it = schedule->assignment().find(p);
    if (it != schedule->assignment().end()) {
      next = (it->second + 1) % rows;
    } else {
      (*schedule->mutable_assignment())[p] = next;
      next = (next + 1) % rows;
    }
  }
}

}  // namespace

void FoldStudyRecord(const v1::Record& r, v1::Study* study) {
  study->set_last_sequence(r.sequence());
  study->set_head_hash(r.hash());
  if (!r.has_study()) return;
  const v1::StudyEvent& e = r.study();
  switch (e.event()) {
    case v1::StudyEvent::KIND_CREATED:
      study->set_name(e.name());
      study->set_description(e.description());
      study->set_created_session_ns(r.written_session_ns());
      break;
    case v1::StudyEvent::KIND_CONDITION:
      *study->add_conditions() = e.condition();
      break;
    case v1::StudyEvent::KIND_PARTICIPANTS:
      for (const std::string& p : e.participants()) study->add_participants(p);
      AssignRows(study);
      break;
    case v1::StudyEvent::KIND_SCHEDULE:
      *study->mutable_schedule() = e.schedule();
      AssignRows(study);
      break;
    case v1::StudyEvent::KIND_SESSION: {
      auto* s = study->add_sessions();
      s->set_session_id(e.session_id());
      s->set_condition(e.name());
      *s->mutable_participants() = e.participants();
      s->set_sequence(r.sequence());
      s->set_created_session_ns(r.written_session_ns());
      break;
    }
    default:
      break;
  }
}

absl::StatusOr<v1::Study> LoadStudy(ledger::Ledger* ledger, const std::string& id) {
  auto row = ledger->GetStudy(id);
  if (!row.ok()) return row.status();
  v1::Study study;
  study.set_id(row->id);
  study.set_name(row->title);
  study.set_created_session_ns(row->opened_session_ns);
  uint64_t from = 1;
  while (true) {
    auto batch = ledger->Read(id, from, 1024);
    if (!batch.ok()) return batch.status();
    if (batch->empty()) break;
    for (const v1::Record& r : *batch) FoldStudyRecord(r, &study);
    from = batch->back().sequence() + 1;
  }
  return study;
}

absl::StatusOr<v1::Record> AppendStudyEvent(ledger::Ledger* ledger, const std::string& study_id,
                                            v1::StudyEvent event, int64_t written_session_ns) {
  v1::Record r;
  r.set_written_session_ns(written_session_ns);
  *r.mutable_study() = std::move(event);
  std::vector<v1::Record> records;
  records.push_back(std::move(r));
  auto promise = std::make_shared<std::promise<absl::StatusOr<v1::Record>>>();
  auto future = promise->get_future();
  auto seq = ledger->Append(study_id, std::move(records),
                            [promise](const absl::Status& s, const std::vector<v1::Record>& done) {
                              if (!s.ok()) {
                                promise->set_value(s);
                              } else if (done.empty()) {
                                promise->set_value(absl::InternalError("no record committed"));
                              } else {
                                promise->set_value(done.front());
                              }
                            });
  if (!seq.ok()) return seq.status();
  return future.get();
}

}  // namespace tickmark::rpc

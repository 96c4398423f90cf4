// A Ledger that wraps a real one and, while a fault is set, fails appends
// the way a ledger on a full disk does: synchronously, on the caller's
// thread. Two ways, because both happen:
//   kFailFast          Append returns the error and never calls back (the
//                      SQLite ledger once a write has failed);
//   kCallbackOnCaller  Append runs the callback with the error right away,
//                      before returning, then returns the error.
// Everything else is passed through. Thread-safe as the wrapped ledger is.
#ifndef TICKMARK_TESTS_RPC_FAULT_LEDGER_H_
#define TICKMARK_TESTS_RPC_FAULT_LEDGER_H_

#include <atomic>

#include "server/ledger/ledger.h"

namespace tickmark::testing {

class FaultLedger final : public ledger::Ledger {
 public:
  enum class Mode { kNone, kFailFast, kCallbackOnCaller };

  explicit FaultLedger(ledger::Ledger* inner) : inner_(inner) {}

  // Mode for feedback and step records, and for every other record.
  void SetFault(Mode client_records, Mode other_records) {
    client_mode_.store(client_records);
    other_mode_.store(other_records);
  }
  void Clear() { SetFault(Mode::kNone, Mode::kNone); }
  uint64_t failed_appends() const { return failed_.load(); }

  absl::StatusOr<uint64_t> Append(std::string_view session_id,
                                  std::vector<tickmark::v1::Record> records,
                                  ledger::CommitCallback done) override {
    const bool client = !records.empty() && ledger::ClientKeyOf(records.front()).has_value();
    const Mode mode = client ? client_mode_.load() : other_mode_.load();
    if (mode == Mode::kNone) return inner_->Append(session_id, std::move(records), std::move(done));
    failed_.fetch_add(1);
    const absl::Status error = absl::ResourceExhaustedError("injected: database or disk is full");
    if (mode == Mode::kCallbackOnCaller && done) done(error, records);
    return error;
  }

  absl::Status CreateSession(const ledger::SessionRow& row) override {
    return inner_->CreateSession(row);
  }
  absl::StatusOr<ledger::SessionRow> GetSession(std::string_view id) override {
    return inner_->GetSession(id);
  }
  absl::StatusOr<std::vector<ledger::SessionRow>> ListSessions(bool include_closed) override {
    return inner_->ListSessions(include_closed);
  }
  absl::Status CloseSession(std::string_view id, int64_t closed_session_ns) override {
    return inner_->CloseSession(id, closed_session_ns);
  }
  absl::Status ReanchorSession(std::string_view id, int64_t utc_anchor_ns, int64_t mono_anchor_ns,
                               std::string_view boot_id) override {
    return inner_->ReanchorSession(id, utc_anchor_ns, mono_anchor_ns, boot_id);
  }
  absl::Status PutToken(const ledger::TokenRow& row) override { return inner_->PutToken(row); }
  absl::StatusOr<ledger::TokenRow> FindTokenByHash(std::string_view hash) override {
    return inner_->FindTokenByHash(hash);
  }
  absl::StatusOr<std::vector<ledger::TokenRow>> ListTokens(std::string_view session_id) override {
    return inner_->ListTokens(session_id);
  }
  absl::StatusOr<ledger::TokenRow> RevokeToken(std::string_view session_id,
                                               std::string_view token_id) override {
    return inner_->RevokeToken(session_id, token_id);
  }
  void Barrier(std::function<void()> done) override { inner_->Barrier(std::move(done)); }
  absl::Status Flush() override { return inner_->Flush(); }
  absl::StatusOr<std::vector<tickmark::v1::Record>> Read(std::string_view session_id, uint64_t from,
                                                         size_t max) override {
    return inner_->Read(session_id, from, max);
  }
  absl::StatusOr<std::optional<uint64_t>> FindClientSequence(std::string_view session_id,
                                                             std::string_view client_id,
                                                             uint64_t client_sequence) override {
    return inner_->FindClientSequence(session_id, client_id, client_sequence);
  }
  absl::StatusOr<uint64_t> LastClientSequence(std::string_view session_id,
                                              std::string_view client_id) override {
    return inner_->LastClientSequence(session_id, client_id);
  }
  absl::StatusOr<ledger::RecordCounts> Counts(std::string_view session_id) override {
    return inner_->Counts(session_id);
  }
  uint64_t CommittedSequence(std::string_view session_id) override {
    return inner_->CommittedSequence(session_id);
  }
  absl::Status PutDerivedSet(std::string_view session_id, std::string_view name,
                             std::string_view spec,
                             const std::vector<tickmark::v1::Record>& records,
                             bool overwrite) override {
    return inner_->PutDerivedSet(session_id, name, spec, records, overwrite);
  }
  absl::Status WriteHealth() override { return inner_->WriteHealth(); }
  void Close() override { inner_->Close(); }

 private:
  ledger::Ledger* const inner_;  // not owned
  std::atomic<Mode> client_mode_{Mode::kNone};
  std::atomic<Mode> other_mode_{Mode::kNone};
  std::atomic<uint64_t> failed_{0};
};

}  // namespace tickmark::testing

#endif  // TICKMARK_TESTS_RPC_FAULT_LEDGER_H_

// A Ledger that passes every call to another one: the base of the tests'
// fault-injecting ledgers, which override only what they change.
// Thread-safe as the wrapped ledger is.
#ifndef TICKMARK_TESTS_RPC_FORWARDING_LEDGER_H_
#define TICKMARK_TESTS_RPC_FORWARDING_LEDGER_H_

#include <memory>

#include "server/ledger/ledger.h"

namespace tickmark::testing {

class ForwardingLedger : public ledger::Ledger {
 public:
  // Forwards to `inner`, which must outlive this.
  explicit ForwardingLedger(ledger::Ledger* inner) : inner_(inner) {}
  // Forwards to `inner` and owns it.
  explicit ForwardingLedger(std::unique_ptr<ledger::Ledger> inner)
      : owned_(std::move(inner)), inner_(owned_.get()) {}

  absl::StatusOr<uint64_t> Append(std::string_view session_id,
                                  std::vector<tickmark::v1::Record> records,
                                  ledger::CommitCallback done) override {
    return inner_->Append(session_id, std::move(records), std::move(done));
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
  absl::StatusOr<std::vector<tickmark::v1::Record>> ReadCalibrationEvents(
      std::string_view session_id, std::string_view client_id, std::string_view run) override {
    return inner_->ReadCalibrationEvents(session_id, client_id, run);
  }
  absl::StatusOr<std::vector<ledger::CalibrationRow>> ListCalibrations(
      std::string_view trainer) override {
    return inner_->ListCalibrations(trainer);
  }
  absl::StatusOr<tickmark::v1::Record> GetCalibration(std::string_view id) override {
    return inner_->GetCalibration(id);
  }
  absl::StatusOr<std::optional<tickmark::v1::Record>> LatestCalibration(
      std::string_view trainer) override {
    return inner_->LatestCalibration(trainer);
  }
  absl::Status PutDerivedSet(std::string_view session_id, std::string_view name,
                             std::string_view spec,
                             const std::vector<tickmark::v1::Record>& records,
                             bool overwrite) override {
    return inner_->PutDerivedSet(session_id, name, spec, records, overwrite);
  }
  absl::Status WriteHealth() override { return inner_->WriteHealth(); }
  void Close() override { inner_->Close(); }

 protected:
  ledger::Ledger* inner() const { return inner_; }

 private:
  std::unique_ptr<ledger::Ledger> owned_;
  ledger::Ledger* const inner_;
};

}  // namespace tickmark::testing

#endif  // TICKMARK_TESTS_RPC_FORWARDING_LEDGER_H_

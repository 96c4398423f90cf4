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
#include "tests/rpc/forwarding_ledger.h"

namespace tickmark::testing {

class FaultLedger final : public ForwardingLedger {
 public:
  enum class Mode { kNone, kFailFast, kCallbackOnCaller };

  explicit FaultLedger(ledger::Ledger* inner) : ForwardingLedger(inner) {}

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
    if (mode == Mode::kNone) return inner()->Append(session_id, std::move(records), std::move(done));
    failed_.fetch_add(1);
    const absl::Status error = absl::ResourceExhaustedError("injected: database or disk is full");
    if (mode == Mode::kCallbackOnCaller && done) done(error, records);
    return error;
  }


 private:
  std::atomic<Mode> client_mode_{Mode::kNone};
  std::atomic<Mode> other_mode_{Mode::kNone};
  std::atomic<uint64_t> failed_{0};
};

}  // namespace tickmark::testing

#endif  // TICKMARK_TESTS_RPC_FAULT_LEDGER_H_

// Retiming a session (SessionAdmin.Retime; docs/time-model.md, "Retiming"):
// read the session's records, gather each client clock's probes and event
// times, recompute the events with RetimeClock (server/core/retime.h), and
// store the result as a derived time set (Ledger::PutTimeSet) beside the
// untouched originals. Also what a replay needs to credit with a time set.
//
// A client clock is one connection of one client id: a reconnecting client
// may be another process or a rebooted device, so its clock is not assumed
// continuous across connections. Within a connection the live model's
// restarts (ClockModelUpdate reason "restart: ...") and its unconfirmed-jump
// candidates are passed on, so jumps split the clock where the live model
// split it.
//
// Thread safety: RetimeCollector is thread-compatible; RunRetime and the
// time set helpers may be called from any thread (they read and write the
// ledger, so never from a gRPC callback or the ledger thread, nor under a
// lock).
#ifndef TICKMARK_SERVER_RPC_RETIME_RUNNER_H_
#define TICKMARK_SERVER_RPC_RETIME_RUNNER_H_

#include <functional>
#include <map>
#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "server/core/retime.h"
#include "server/ledger/ledger.h"
#include "tickmark/v1/admin.pb.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::rpc {

// The retiming method's name, as time sets record it.
inline constexpr const char* kRetimeMethod = "two-sided probe bounds";

// The inputs of RetimeClock for every client clock of a session, gathered
// from its records in sequence order.
class RetimeCollector {
 public:
  // Where an event time came from: its record and which time of it.
  struct EventRef {
    uint64_t sequence = 0;
    const char* kind = "";  // "feedback", "step_start", "step_end"
    // Mapped live through real time (Feedback/Step.time_source): probes on
    // both sides cannot beat the asymmetry that route got past
    // (docs/time-model.md, "Disciplined clocks"), so its live time is kept
    // unless the retimed bound is tighter.
    bool realtime = false;
  };
  struct Clock {
    std::string client_id;
    std::vector<RetimeProbe> probes;  // accepted probes and jump candidates
    std::vector<RetimeEvent> events;
    std::vector<EventRef> refs;  // one per event
  };

  // Feeds one record; records must come in sequence order.
  void Add(const tickmark::v1::Record& r);

  const std::vector<Clock>& clocks() const { return clocks_; }

 private:
  Clock& Current(const std::string& client_id);
  void AddEvent(const std::string& client_id, uint64_t sequence, const char* kind,
                int64_t client_ns, int64_t live_ns, int64_t uncertainty_ns, int64_t arrival_ns,
                bool realtime);

  std::vector<Clock> clocks_;
  std::map<std::string, size_t> current_;  // client id -> its current connection's clock
};

// Retimes every clock. The rows go to PutTimeSet; the summary's counts and
// quantiles are filled (not the progress fields, nor time_set).
struct RetimeResult {
  std::vector<ledger::DerivedTimeRow> rows;
  tickmark::v1::RetimeResponse summary;
};
RetimeResult ComputeRetime(const RetimeCollector& collected, const RetimeOptions& options);

// The whole job: reads records 1..(the session's last committed one),
// computes, stores the set under a fresh id ("ts-" + 8 hex digits) and
// returns the summary (finished set). `progress(done, total)` is called
// now and then while reading; `cancelled()` is polled between chunks.
// NOT_FOUND for an unknown session; FAILED_PRECONDITION when the session has
// no feedback or steps.
absl::StatusOr<tickmark::v1::RetimeResponse> RunRetime(
    ledger::Ledger* ledger, const std::string& session_id, const RetimeOptions& options,
    const std::function<void(uint64_t done, uint64_t total)>& progress,
    const std::function<bool()>& cancelled);

// Event times of a time set by record sequence, for crediting with them.
struct DerivedTimes {
  ledger::TimeSetRow set;
  struct Times {
    int64_t event_ns = 0, event_uncertainty_ns = 0;  // feedback
    int64_t start_ns = 0, start_uncertainty_ns = 0;  // step
    int64_t end_ns = 0;
    bool has_event = false, has_start = false, has_end = false;
  };
  std::map<uint64_t, Times> by_sequence;
};

// Loads the time set `id` ("latest": the session's newest) of `session_id`.
// NOT_FOUND when there is none, or the set belongs to another session.
absl::StatusOr<DerivedTimes> LoadDerivedTimes(ledger::Ledger* ledger, const std::string& session_id,
                                              const std::string& id);

// Puts the set's times into a feedback or step record (a copy to credit
// with); false when the set has none for it.
bool ApplyDerivedTimes(const DerivedTimes& times, tickmark::v1::Record* record);

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_RETIME_RUNNER_H_

// Drives a CreditEngine from ledger records, live or in a replay.
//
// Input records, in ledger order: kernel settings, steps, feedback, the
// session's "closed" event; every non-derived record's written time also
// moves the watermark (max of written_session_ns seen), so the same ledger
// always gives the same watermark sequence and so bit-identical output.
// Output: derived records (credit, label, unmatched) with no sequence,
// written_session_ns taken from the record that caused them.
//
// The session default kernel is the first KernelSetting with an empty
// trainer (written when the session opens); records before it produce
// nothing. Overrides replace recorded kernels (replay with another kernel).
//
// Not thread-safe: the owner serialises calls.
#ifndef TICKMARK_SERVER_RPC_CREDIT_DRIVER_H_
#define TICKMARK_SERVER_RPC_CREDIT_DRIVER_H_

#include <map>
#include <memory>
#include <optional>
#include <set>
#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "server/core/credit_engine.h"
#include "server/core/delay_kernel.h"
#include "tickmark/v1/records.pb.h"

namespace tickmark::rpc {

// DelayKernel <-> its proto message.
tickmark::v1::DelayKernel KernelToProto(const DelayKernel& k);
absl::StatusOr<DelayKernel> KernelFromProto(const tickmark::v1::DelayKernel& p);
// Parses the text form; INVALID_ARGUMENT with the parser's reason.
absl::StatusOr<DelayKernel> ParseKernel(const std::string& text);

class CreditDriver {
 public:
  struct Overrides {
    std::optional<DelayKernel> all;                 // every trainer and the default
    std::map<std::string, DelayKernel> trainers;    // per trainer, wins over `all`
    bool empty() const { return !all && trainers.empty(); }
  };

  explicit CreditDriver(Overrides overrides = {}) : overrides_(std::move(overrides)) {}

  // True for the records the engine reads (everything but derived records).
  static bool IsInput(const tickmark::v1::Record& r);
  // A key naming a derived record's content: ("credit", feedback, step),
  // ("label", 0, step), ("unmatched", feedback, step).
  static std::tuple<int, uint64_t, uint64_t> DerivedKey(const tickmark::v1::Record& r);

  // Feeds one record; appends what it causes to `out`.
  void Feed(const tickmark::v1::Record& r, std::vector<tickmark::v1::Record>* out);

  // Ends every open step at `end_ns` and settles everything: what the
  // session's "closed" record does. The server calls it just before writing
  // that record (so the final labels precede it); feeding the record after
  // that adds nothing.
  void Finish(int64_t end_ns, std::vector<tickmark::v1::Record>* out);

  // Kernel descriptions in force (for replay specs).
  std::string Describe() const;
  // The kernel a trainer is credited with now (canonical text): their own
  // setting or override, else the session default's; "" before the default.
  std::string KernelOf(const std::string& trainer) const;
  // The calibration the trainer's recorded kernel in force came from ("" if
  // none, or if an override replaced it).
  std::string CalibrationOf(const std::string& trainer) const;

 private:
  void Emit(const EngineOutput& o, int64_t written_ns, std::vector<tickmark::v1::Record>* out);
  DelayKernel Choose(const std::string& trainer, const DelayKernel& recorded) const;

  Overrides overrides_;
  std::unique_ptr<CreditEngine> engine_;  // from the session default on
  int64_t watermark_ns_ = std::numeric_limits<int64_t>::min();
  std::set<std::string> agents_;          // agents with steps, for closing
  // agent -> explicit end of its last step (session ns) and the stated
  // uncertainty of that mapping.
  struct MappedEnd {
    int64_t end_ns = 0;
    int64_t uncertainty_ns = 0;
  };
  std::map<std::string, MappedEnd> last_end_;
  std::map<std::string, std::string> in_force_;  // trainer ("" default) -> description
  std::map<std::string, std::string> calibration_of_;  // trainer -> recorded calibration id
};

}  // namespace tickmark::rpc

#endif  // TICKMARK_SERVER_RPC_CREDIT_DRIVER_H_

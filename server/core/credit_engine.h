// CreditEngine: turns a session's steps and feedback into credit updates,
// settled labels and unmatched reports (docs/architecture.md §5).
//
// The server feeds it, in ledger order, every step and feedback (each with
// its ledger sequence number) and every watermark advance; each call returns
// the records to publish, in the order credits, unmatched, rejected, labels
// (a label sums credits, so it follows them). The engine does no I/O, owns
// all its state, and is deterministic: the same calls in the same order give
// bit-identical outputs, so replaying a ledger reproduces its labels.
// Single-threaded: not thread-safe; the owner serialises calls.
// Precondition: ledger sequence numbers are unique across steps and feedback
// (the ledger assigns them; duplicates are removed before they get there).
//
// Semantics:
// - Timelines. Each agent has its own timeline of steps, ordered by start;
//   starts must strictly increase per agent and a step may not begin before
//   the agent's previous explicit end. A step without an end is *open*; the
//   agent's next step (or CloseAgent) ends it at that step's start.
//   A step breaking these rules is rejected (reported, changes nothing);
//   CheckStep() lets the server refuse it before writing the ledger.
// - Credit. Feedback f (event time t_f, trainer k with kernel F_k and weight
//   w_k) gives step [s, e) credit F_k(t_f - s) - F_k(t_f - e), F_k the cut,
//   renormalised CDF — exactly tickmark::Credit(). Only positive credits are
//   emitted. Every kernel starts at delay >= 0, so a step that starts at or
//   after t_f never gets credit from f. A feedback credits the steps of every
//   agent in reach, each on its own timeline.
// - Open steps. The credit of an open step depends on its unknown end, so
//   feedback in reach of an open step is *held* on it and credited when the
//   step ends, on its final interval. (Crediting early with end = +inf would
//   be exact only for steps out of reach, which get nothing anyway.) Each
//   (feedback, step) credit is emitted exactly once, with its final value.
// - Late agent data. A feedback stays open to steps that arrive later until
//   the watermark reaches t_f + allowed_lateness (its deadline); steps
//   arriving before then are credited on arrival.
// - Unmatched. A feedback that, once past its deadline and with no step
//   still holding it, has credited nothing is reported unmatched once, then
//   dropped. A feedback whose reach includes a step that already settled (it
//   came later than the watermark allowed for, or its trainer's kernel is
//   wider than any kernel in force when the step settled) credits nothing and
//   is reported unmatched at once: partial credit would be biased.
// - Trainers. Each feedback uses its trainer's kernel and weight as set when
//   the feedback is added; trainers never set use Options::default_kernel
//   and weight 1.
// - Settlement. A step settles when it has an end and the watermark w
//   satisfies end + H + allowed_lateness <= w, H the largest horizon of any
//   kernel set so far. Its label is then emitted once (also when it got no
//   credit: weight 0) and the step is dropped: value = Σ credit × value ×
//   weight, weight = Σ credit, with a per-trainer breakdown in the same form,
//   parts ordered by trainer name.
// - Memory is bounded by the steps not yet settled and the feedback not yet
//   resolved. Lookups binary-search each agent's steps by end.
#ifndef TICKMARK_SERVER_CORE_CREDIT_ENGINE_H_
#define TICKMARK_SERVER_CORE_CREDIT_ENGINE_H_

#include <cstdint>
#include <deque>
#include <limits>
#include <map>
#include <optional>
#include <set>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "server/core/delay_kernel.h"
#include "server/core/time.h"

namespace tickmark {

struct StepInput {
  uint64_t sequence = 0;  // ledger sequence of the step record
  std::string agent;
  uint64_t step_id = 0;
  SessionTime start;
  std::optional<SessionTime> end;  // absent: ends at the agent's next start
};

struct FeedbackInput {
  uint64_t sequence = 0;  // ledger sequence of the feedback record
  std::string trainer;
  double value = 0;
  SessionTime event;  // event time mapped to session time
};

struct CreditOut {
  uint64_t feedback_sequence = 0;
  uint64_t step_sequence = 0;
  std::string trainer;
  std::string agent;
  uint64_t step_id = 0;
  double credit = 0;  // share of the feedback given to the step
  double value = 0;   // the feedback's value
  double weight = 0;  // the trainer's weight
  // DelayKernel::Describe() of the kernel used. Points into the engine,
  // which keeps every description it issued until it is destroyed; copying
  // it once into the published record is cheaper than a string per credit.
  std::string_view kernel;
};

struct LabelPartOut {
  std::string trainer;
  double value = 0;   // Σ credit × value × weight over this trainer
  double weight = 0;  // Σ credit over this trainer
};

struct LabelOut {
  uint64_t step_sequence = 0;
  std::string agent;
  uint64_t step_id = 0;
  double value = 0;   // Σ credit × value × weight
  double weight = 0;  // Σ credit
  std::vector<LabelPartOut> parts;  // ordered by trainer
  // The interval credited: for a step sent without an end, the end used
  // (its agent's next start, or where the agent was closed).
  SessionTime start;
  SessionTime end;
};

struct UnmatchedOut {
  uint64_t feedback_sequence = 0;
  std::string trainer;
  std::string reason;
};

struct RejectedStepOut {
  uint64_t step_sequence = 0;
  std::string agent;
  uint64_t step_id = 0;
  std::string reason;
};

// Within each vector: credits by (feedback, step) sequence, the rest by
// their own sequence. Labels are summed in the order credits are published,
// so re-summing a step's published credits reproduces its label exactly.
struct EngineOutput {
  std::vector<CreditOut> credits;
  std::vector<UnmatchedOut> unmatched;
  std::vector<RejectedStepOut> rejected;
  std::vector<LabelOut> labels;
};

class CreditEngine {
 public:
  struct Options {
    DelayKernel default_kernel;
    // How far behind the watermark a feedback may still arrive; >= 0.
    Duration allowed_lateness = Duration::Zero();
  };

  explicit CreditEngine(Options options);

  // Sets the kernel and weight (finite, >= 0) for the trainer's feedback
  // added from now on. False, with *error set, if the weight is invalid.
  bool SetTrainer(std::string trainer, DelayKernel kernel, double weight,
                  std::string* error = nullptr);

  // Why AddStep would reject this step, or nullopt if it would accept it.
  std::optional<std::string> CheckStep(const StepInput& step) const;

  // Adds a step; ends the agent's open step at this step's start.
  EngineOutput AddStep(const StepInput& step);
  // Ends the agent's open step at `end` (agent gone, session closing).
  // A no-op if the agent has no open step or end is not after its start
  // (then nothing changes; the step stays open).
  EngineOutput CloseAgent(const std::string& agent, SessionTime end);
  EngineOutput AddFeedback(const FeedbackInput& feedback);
  // Moves the watermark forward (a lower value is ignored); settles steps
  // and resolves feedback whose deadline passed.
  EngineOutput AdvanceWatermark(SessionTime watermark);

  SessionTime watermark() const { return watermark_; }
  size_t pending_steps() const;
  size_t pending_feedback() const { return feedback_.size(); }

 private:
  // A kernel and weight as in force from one SetTrainer on.
  struct TrainerKernel {
    DelayKernel kernel;
    double weight;
    std::string description;
  };
  struct Part {
    std::string trainer;
    double value = 0;
    double weight = 0;
  };
  struct Step {
    uint64_t sequence;
    uint64_t step_id;
    SessionTime start;
    SessionTime end;  // kOpenEnd while open
    double value = 0;
    double weight = 0;
    std::vector<Part> parts;
  };
  struct Agent {
    std::string name;
    std::deque<Step> steps;  // unsettled, by start; only the last may be open
    std::vector<uint64_t> held;  // feedback held on the open step
    std::optional<SessionTime> last_start;  // of any step ever added
    std::optional<SessionTime> last_end;    // explicit end of the last step
    // End of the last settled step: time before it is final for this agent.
    std::optional<SessionTime> settled_until;
  };
  struct Feedback {
    uint64_t sequence;
    std::string trainer;
    double value;
    SessionTime event;
    size_t kernel;     // index into kernels_
    int holds = 0;     // open steps holding this feedback
    bool matched = false;     // some credit > 0 emitted
    bool past_deadline = false;  // closed to steps arriving later
  };

  static constexpr SessionTime kOpenEnd =
      SessionTime::FromNanos(std::numeric_limits<int64_t>::max());

  const TrainerKernel& KernelFor(const std::string& trainer) const;
  // Emits credit c > 0 of f on a closed step and adds it to its label.
  void Apply(Feedback& f, const Agent& agent, Step& step, double c,
             EngineOutput& out);
  // Step [start, end) (end may be kOpenEnd) could get credit from f.
  bool InReach(const Feedback& f, SessionTime start, SessionTime end) const;
  // Gives the agent's newest step the credit of feedback already present.
  void MatchNewStep(Agent& agent, EngineOutput& out);
  // Ends the agent's open step at `end` and credits its held feedback.
  void CloseOpenStep(Agent& agent, SessionTime end, EngineOutput& out);
  void Settle(EngineOutput& out);
  // Reports and drops feedback past its deadline that nothing holds.
  void Resolve(EngineOutput& out);
  static void SortOutput(EngineOutput& out);

  Options options_;
  // [0] is the default kernel. A deque, so descriptions never move and the
  // views handed out in CreditOut::kernel stay valid.
  std::deque<TrainerKernel> kernels_;
  std::map<std::string, size_t> trainers_;  // trainer -> index in kernels_
  Duration max_horizon_;        // largest horizon of any kernel set so far
  Duration min_lower_;          // smallest lower bound of any kernel
  SessionTime watermark_ =
      SessionTime::FromNanos(std::numeric_limits<int64_t>::min());
  std::map<std::string, Agent> agents_;
  std::map<uint64_t, Feedback> feedback_;  // unresolved, by sequence
  // Feedback before its deadline, by (event time, sequence).
  std::set<std::pair<SessionTime, uint64_t>> open_feedback_;
  std::vector<uint64_t> maybe_resolved_;  // to check in Resolve()
};

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_CREDIT_ENGINE_H_

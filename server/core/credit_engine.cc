#include "server/core/credit_engine.h"

#include <algorithm>
#include <cmath>
#include <tuple>

namespace tickmark {
namespace {

// The initial watermark: the lowest representable instant. Time arithmetic
// saturates (server/core/time.h), so watermark − d stays there.
constexpr int64_t kMinNanos = std::numeric_limits<int64_t>::min();

}  // namespace

CreditEngine::CreditEngine(Options options) : options_(std::move(options)) {
  if (options_.allowed_lateness < Duration::Zero()) {
    options_.allowed_lateness = Duration::Zero();
  }
  const DelayKernel& k = options_.default_kernel;
  kernels_.push_back({k, 1.0, k.Describe()});
  max_horizon_ = k.Horizon();
  min_lower_ = k.LowerBound();
}

bool CreditEngine::SetTrainer(std::string trainer, DelayKernel kernel,
                              double weight, std::string* error) {
  if (!std::isfinite(weight) || weight < 0) {
    if (error != nullptr) *error = "trainer weight must be finite and >= 0";
    return false;
  }
  max_horizon_ = std::max(max_horizon_, kernel.Horizon());
  min_lower_ = std::min(min_lower_, kernel.LowerBound());
  std::string description = kernel.Describe();
  kernels_.push_back({std::move(kernel), weight, std::move(description)});
  trainers_[std::move(trainer)] = kernels_.size() - 1;
  return true;
}

const CreditEngine::TrainerKernel& CreditEngine::KernelFor(
    const std::string& trainer) const {
  auto it = trainers_.find(trainer);
  return kernels_[it == trainers_.end() ? 0 : it->second];
}

size_t CreditEngine::pending_steps() const {
  size_t n = 0;
  for (const auto& [name, agent] : agents_) n += agent.steps.size();
  return n;
}

bool CreditEngine::InReach(const Feedback& f, SessionTime start,
                           SessionTime end) const {
  const DelayKernel& k = kernels_[f.kernel].kernel;
  return f.event - start > k.LowerBound() &&
         (end == kOpenEnd || f.event - end < k.Horizon());
}

void CreditEngine::Apply(Feedback& f, const Agent& agent, Step& step, double c,
                         EngineOutput& out) {
  if (!(c > 0)) return;
  const TrainerKernel& tk = kernels_[f.kernel];
  const double credited = c * f.value * tk.weight;
  f.matched = true;
  step.value += credited;
  step.weight += c;
  auto part = std::find_if(step.parts.begin(), step.parts.end(),
                           [&](const Part& p) { return p.trainer == f.trainer; });
  if (part == step.parts.end()) {
    step.parts.push_back({f.trainer, 0, 0});
    part = step.parts.end() - 1;
  }
  part->value += credited;
  part->weight += c;
  out.credits.push_back({f.sequence, step.sequence, f.trainer, agent.name,
                         step.step_id, c, f.value, tk.weight, tk.description});
}

std::optional<std::string> CreditEngine::CheckStep(const StepInput& step) const {
  if (step.start == kOpenEnd ||
      step.start == SessionTime::FromNanos(kMinNanos) ||
      (step.end && *step.end == kOpenEnd)) {
    return "step time out of range";
  }
  if (step.end && *step.end <= step.start) return "step end not after its start";
  auto it = agents_.find(step.agent);
  if (it == agents_.end()) return std::nullopt;
  const Agent& agent = it->second;
  if (agent.last_start && step.start <= *agent.last_start) {
    return "step start not after the agent's previous step start";
  }
  if (agent.last_end && step.start < *agent.last_end) {
    return "step starts before the agent's previous step ended";
  }
  return std::nullopt;
}

EngineOutput CreditEngine::AddStep(const StepInput& input) {
  EngineOutput out;
  if (std::optional<std::string> reason = CheckStep(input)) {
    out.rejected.push_back(
        {input.sequence, input.agent, input.step_id, std::move(*reason)});
    return out;
  }
  auto [it, inserted] = agents_.try_emplace(input.agent);
  Agent& agent = it->second;
  if (inserted) agent.name = input.agent;
  if (!agent.steps.empty() && agent.steps.back().end == kOpenEnd) {
    CloseOpenStep(agent, input.start, out);
  }
  Step step{input.sequence, input.step_id, input.start,
            input.end.value_or(kOpenEnd), 0, 0, {}};
  agent.steps.push_back(std::move(step));
  agent.last_start = input.start;
  agent.last_end = input.end;
  MatchNewStep(agent, out);
  Settle(out);
  Resolve(out);
  SortOutput(out);
  return out;
}

EngineOutput CreditEngine::CloseAgent(const std::string& name,
                                      SessionTime end) {
  EngineOutput out;
  auto it = agents_.find(name);
  if (it == agents_.end()) return out;
  Agent& agent = it->second;
  if (agent.steps.empty() || agent.steps.back().end != kOpenEnd ||
      end <= agent.steps.back().start || end == kOpenEnd) {
    return out;
  }
  CloseOpenStep(agent, end, out);
  agent.last_end = end;
  Settle(out);
  Resolve(out);
  SortOutput(out);
  return out;
}

void CreditEngine::CloseOpenStep(Agent& agent, SessionTime end,
                                 EngineOutput& out) {
  Step& step = agent.steps.back();
  step.end = end;
  std::vector<uint64_t> held = std::move(agent.held);
  agent.held.clear();
  std::sort(held.begin(), held.end());
  for (uint64_t seq : held) {
    Feedback& f = feedback_.at(seq);
    Apply(f, agent, step,
          Credit(kernels_[f.kernel].kernel, f.event, step.start, step.end),
          out);
    if (--f.holds == 0 && f.past_deadline) maybe_resolved_.push_back(seq);
  }
}

void CreditEngine::MatchNewStep(Agent& agent, EngineOutput& out) {
  Step& step = agent.steps.back();
  const bool open = step.end == kOpenEnd;
  // Feedback in reach has start + lower < t_f < end + horizon for its own
  // kernel; the widest bounds over all kernels narrow the scan.
  auto it = open_feedback_.upper_bound(
      {step.start + min_lower_, std::numeric_limits<uint64_t>::max()});
  const SessionTime stop = open ? kOpenEnd : step.end + max_horizon_;
  std::vector<uint64_t> reached;
  for (; it != open_feedback_.end() && it->first < stop; ++it) {
    if (InReach(feedback_.at(it->second), step.start, step.end)) {
      reached.push_back(it->second);
    }
  }
  // Applied in sequence order, the order credits are published in, so a
  // subscriber summing the credits reproduces the label bit for bit.
  std::sort(reached.begin(), reached.end());
  for (uint64_t seq : reached) {
    Feedback& f = feedback_.at(seq);
    if (open) {
      agent.held.push_back(f.sequence);
      ++f.holds;
    } else {
      Apply(f, agent, step,
            Credit(kernels_[f.kernel].kernel, f.event, step.start, step.end),
            out);
    }
  }
}

EngineOutput CreditEngine::AddFeedback(const FeedbackInput& input) {
  EngineOutput out;
  if (!std::isfinite(input.value)) {
    out.unmatched.push_back({input.sequence, input.trainer, "value not finite"});
    return out;
  }
  auto kit = trainers_.find(input.trainer);
  Feedback f{input.sequence, input.trainer, input.value, input.event,
             kit == trainers_.end() ? 0 : kit->second};
  const DelayKernel& kernel = kernels_[f.kernel].kernel;
  const Duration lower = kernel.LowerBound();
  const Duration horizon = kernel.Horizon();
  for (const auto& [name, agent] : agents_) {
    if (agent.settled_until && f.event - *agent.settled_until < horizon) {
      out.unmatched.push_back(
          {f.sequence, f.trainer,
           "late: reach extends into time already settled for agent " + name});
      return out;
    }
  }
  f.past_deadline = input.event <= watermark_ - options_.allowed_lateness;

  for (auto& [name, agent] : agents_) {
    auto& steps = agent.steps;
    // Ends increase along the timeline (the open step, last, ends at +inf),
    // so steps ending at or before t_f - horizon form a prefix.
    auto first = std::partition_point(
        steps.begin(), steps.end(), [&](const Step& st) {
          return st.end != kOpenEnd && f.event - st.end >= horizon;
        });
    // CutCdf at the previous step's end, reused as the next step's start
    // value when they touch: one CDF evaluation per contiguous step. The
    // expression stays exactly that of Credit().
    double carried = 0;
    SessionTime carried_at = kOpenEnd;
    for (auto st = first; st != steps.end() && f.event - st->start > lower;
         ++st) {
      if (st->end == kOpenEnd) {
        agent.held.push_back(f.sequence);
        ++f.holds;
        break;
      }
      const double at_start = st->start == carried_at
                                  ? carried
                                  : kernel.CutCdf(f.event - st->start);
      const double at_end = kernel.CutCdf(f.event - st->end);
      const double c = at_start - at_end;
      Apply(f, agent, *st, c > 0 ? c : 0.0, out);
      carried = at_end;
      carried_at = st->end;
    }
  }

  if (!f.past_deadline) open_feedback_.insert({f.event, f.sequence});
  if (f.past_deadline && f.holds == 0) {
    if (!f.matched) {
      out.unmatched.push_back({f.sequence, f.trainer, "no step in reach"});
    }
  } else {
    feedback_.emplace(f.sequence, std::move(f));
  }
  SortOutput(out);
  return out;
}

EngineOutput CreditEngine::AdvanceWatermark(SessionTime watermark) {
  EngineOutput out;
  if (watermark <= watermark_) return out;
  watermark_ = watermark;
  const SessionTime deadline = watermark_ - options_.allowed_lateness;
  while (!open_feedback_.empty() && open_feedback_.begin()->first <= deadline) {
    Feedback& f = feedback_.at(open_feedback_.begin()->second);
    f.past_deadline = true;
    if (f.holds == 0) maybe_resolved_.push_back(f.sequence);
    open_feedback_.erase(open_feedback_.begin());
  }
  Settle(out);
  Resolve(out);
  SortOutput(out);
  return out;
}

void CreditEngine::Settle(EngineOutput& out) {
  const SessionTime limit =
      watermark_ - (max_horizon_ + options_.allowed_lateness);
  for (auto& [name, agent] : agents_) {
    while (!agent.steps.empty() && agent.steps.front().end != kOpenEnd &&
           agent.steps.front().end <= limit) {
      Step& step = agent.steps.front();
      LabelOut label{step.sequence, name, step.step_id, step.value, step.weight,
                     {}, step.start, step.end};
      std::sort(step.parts.begin(), step.parts.end(),
                [](const Part& a, const Part& b) { return a.trainer < b.trainer; });
      label.parts.reserve(step.parts.size());
      for (Part& p : step.parts) {
        label.parts.push_back({std::move(p.trainer), p.value, p.weight});
      }
      out.labels.push_back(std::move(label));
      agent.settled_until = step.end;
      agent.steps.pop_front();
    }
  }
}

void CreditEngine::Resolve(EngineOutput& out) {
  std::sort(maybe_resolved_.begin(), maybe_resolved_.end());
  maybe_resolved_.erase(
      std::unique(maybe_resolved_.begin(), maybe_resolved_.end()),
      maybe_resolved_.end());
  for (uint64_t seq : maybe_resolved_) {
    auto it = feedback_.find(seq);
    if (it == feedback_.end() || !it->second.past_deadline ||
        it->second.holds != 0) {
      continue;
    }
    if (!it->second.matched) {
      out.unmatched.push_back({seq, it->second.trainer, "no step in reach"});
    }
    feedback_.erase(it);
  }
  maybe_resolved_.clear();
}

void CreditEngine::SortOutput(EngineOutput& out) {
  // Usually produced in order already (one agent, one feedback); sorting
  // records that own strings is the costly part, so check first.
  auto credit_less = [](const CreditOut& a, const CreditOut& b) {
    return std::tie(a.feedback_sequence, a.step_sequence) <
           std::tie(b.feedback_sequence, b.step_sequence);
  };
  if (!std::is_sorted(out.credits.begin(), out.credits.end(), credit_less)) {
    std::sort(out.credits.begin(), out.credits.end(), credit_less);
  }
  std::sort(out.unmatched.begin(), out.unmatched.end(),
            [](const UnmatchedOut& a, const UnmatchedOut& b) {
              return a.feedback_sequence < b.feedback_sequence;
            });
  std::sort(out.labels.begin(), out.labels.end(),
            [](const LabelOut& a, const LabelOut& b) {
              return a.step_sequence < b.step_sequence;
            });
}

}  // namespace tickmark

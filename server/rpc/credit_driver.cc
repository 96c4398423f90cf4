#include "server/rpc/credit_driver.h"

#include <sstream>

#include "server/base/strings.h"

namespace tickmark::rpc {

namespace v1 = tickmark::v1;

namespace {
// a + b, held at the int64 limits (uncertainties come from the ledger).
int64_t SaturatingAdd(int64_t a, int64_t b) {
  int64_t sum = 0;
  if (__builtin_add_overflow(a, b, &sum)) return a > 0 ? INT64_MAX : INT64_MIN;
  return sum;
}
}  // namespace

v1::DelayKernel KernelToProto(const DelayKernel& k) {
  v1::DelayKernel p;
  switch (k.kind()) {
    case DelayKernel::Kind::kUniform:
      p.mutable_uniform()->set_min_ns(k.uniform_lower().nanos());
      p.mutable_uniform()->set_max_ns(k.uniform_upper().nanos());
      break;
    case DelayKernel::Kind::kGamma:
      p.mutable_gamma()->set_shape(k.shape());
      p.mutable_gamma()->set_scale_s(k.scale_seconds());
      p.mutable_gamma()->set_shift_ns(k.shift().nanos());
      p.set_horizon_quantile(k.horizon_quantile());
      break;
    case DelayKernel::Kind::kExponential:
      p.mutable_exponential()->set_rate_per_s(k.rate_per_second());
      p.mutable_exponential()->set_shift_ns(k.shift().nanos());
      p.set_horizon_quantile(k.horizon_quantile());
      break;
    case DelayKernel::Kind::kEmpirical:
      p.mutable_empirical()->set_first_edge_ns(k.first_edge().nanos());
      p.mutable_empirical()->set_bin_width_ns(k.bin_width().nanos());
      for (double c : k.counts()) p.mutable_empirical()->add_counts(c);
      break;
    case DelayKernel::Kind::kLognormal:
      p.mutable_lognormal()->set_mu(k.mu());
      p.mutable_lognormal()->set_sigma(k.sigma());
      p.mutable_lognormal()->set_shift_ns(k.shift().nanos());
      p.set_horizon_quantile(k.horizon_quantile());
      break;
    case DelayKernel::Kind::kExGaussian:
      p.mutable_ex_gaussian()->set_mu_s(k.mu());
      p.mutable_ex_gaussian()->set_sigma_s(k.sigma());
      p.mutable_ex_gaussian()->set_tau_s(k.tau_seconds());
      p.set_horizon_quantile(k.horizon_quantile());
      break;
  }
  return p;
}

absl::StatusOr<DelayKernel> KernelFromProto(const v1::DelayKernel& p) {
  std::string error;
  std::optional<DelayKernel> k;
  const double q = p.horizon_quantile() == 0 ? DelayKernel::kDefaultHorizonQuantile
                                             : p.horizon_quantile();
  switch (p.kind_case()) {
    case v1::DelayKernel::kUniform:
      k = DelayKernel::Uniform(Duration::Nanos(p.uniform().min_ns()),
                               Duration::Nanos(p.uniform().max_ns()), &error);
      break;
    case v1::DelayKernel::kGamma:
      k = DelayKernel::Gamma(p.gamma().shape(), p.gamma().scale_s(),
                             Duration::Nanos(p.gamma().shift_ns()), q, &error);
      break;
    case v1::DelayKernel::kExponential:
      k = DelayKernel::Exponential(p.exponential().rate_per_s(),
                                   Duration::Nanos(p.exponential().shift_ns()), q, &error);
      break;
    case v1::DelayKernel::kEmpirical:
      k = DelayKernel::Empirical(Duration::Nanos(p.empirical().first_edge_ns()),
                                 Duration::Nanos(p.empirical().bin_width_ns()),
                                 {p.empirical().counts().begin(), p.empirical().counts().end()},
                                 &error);
      break;
    case v1::DelayKernel::kLognormal:
      k = DelayKernel::Lognormal(p.lognormal().mu(), p.lognormal().sigma(),
                                 Duration::Nanos(p.lognormal().shift_ns()), q, &error);
      break;
    case v1::DelayKernel::kExGaussian:
      k = DelayKernel::ExGaussian(p.ex_gaussian().mu_s(), p.ex_gaussian().sigma_s(),
                                  p.ex_gaussian().tau_s(), q, &error);
      break;
    case v1::DelayKernel::KIND_NOT_SET:
      error = "no kernel kind set";
      break;
  }
  if (!k) return absl::InvalidArgumentError("delay kernel: " + error);
  return *k;
}

absl::StatusOr<DelayKernel> ParseKernel(const std::string& text) {
  std::string error;
  auto k = DelayKernel::Parse(text, &error);
  if (!k) {
    return absl::InvalidArgumentError(
        Cat("delay kernel '", text, "': ", error,
            " (forms: uniform:MIN,MAX  gamma:SHAPE,SCALE[,SHIFT]  exponential:RATE[,SHIFT]  "
            "empirical:EDGE,WIDTH,C0,C1,...; seconds)"));
  }
  return *k;
}

bool CreditDriver::IsInput(const v1::Record& r) {
  return !(r.has_credit() || r.has_label() || r.has_unmatched());
}

std::tuple<int, uint64_t, uint64_t> CreditDriver::DerivedKey(const v1::Record& r) {
  if (r.has_credit()) return {0, r.credit().feedback_sequence(), r.credit().step_sequence()};
  if (r.has_label()) return {1, 0, r.label().step_sequence()};
  if (r.has_unmatched()) return {2, r.unmatched().feedback_sequence(), r.unmatched().step_sequence()};
  return {-1, 0, 0};
}

DelayKernel CreditDriver::Choose(const std::string& trainer, const DelayKernel& recorded) const {
  if (auto it = overrides_.trainers.find(trainer); it != overrides_.trainers.end()) {
    return it->second;
  }
  if (overrides_.all) return *overrides_.all;
  return recorded;
}

std::string CreditDriver::Describe() const {
  std::ostringstream out;
  bool first = true;
  for (const auto& [trainer, d] : in_force_) {
    out << (first ? "" : "; ") << (trainer.empty() ? "default" : trainer) << "=" << d;
    first = false;
  }
  return out.str();
}

std::string CreditDriver::KernelOf(const std::string& trainer) const {
  if (auto it = in_force_.find(trainer); it != in_force_.end()) return it->second;
  if (auto it = in_force_.find(""); it != in_force_.end()) return it->second;
  return "";
}

std::string CreditDriver::CalibrationOf(const std::string& trainer) const {
  auto it = calibration_of_.find(trainer);
  return it == calibration_of_.end() ? "" : it->second;
}

void CreditDriver::Feed(const v1::Record& r, std::vector<v1::Record>* out) {
  if (!IsInput(r)) return;
  const int64_t t = r.written_session_ns();
  if (r.has_kernel()) {
    const v1::KernelSetting& ks = r.kernel();
    auto recorded = KernelFromProto(ks.kernel());
    if (!recorded.ok()) return;  // validated before it was written
    const double weight = ks.weight() > 0 ? ks.weight() : 1.0;
    if (ks.trainer().empty()) {
      if (!engine_) {
        CreditEngine::Options o{Choose("", *recorded),
                                Duration::Nanos(std::max<int64_t>(0, ks.allowed_lateness_ns()))};
        in_force_[""] = o.default_kernel.Describe();
        engine_ = std::make_unique<CreditEngine>(std::move(o));
        // Trainers overridden in a replay but never set in the session.
        for (const auto& [trainer, k] : overrides_.trainers) {
          engine_->SetTrainer(trainer, k, 1.0);
          in_force_[trainer] = k.Describe();
        }
      }
    } else if (engine_) {
      const bool overridden =
          overrides_.trainers.count(ks.trainer()) > 0 || overrides_.all.has_value();
      DelayKernel k = Choose(ks.trainer(), *recorded);
      in_force_[ks.trainer()] = k.Describe();
      if (overridden || ks.calibration().empty()) {
        calibration_of_.erase(ks.trainer());
      } else {
        calibration_of_[ks.trainer()] = ks.calibration();
      }
      engine_->SetTrainer(ks.trainer(), std::move(k), weight);
    }
  }
  if (!engine_) return;
  if (r.has_step()) {
    const v1::Step& s = r.step();
    StepInput in;
    in.sequence = r.sequence();
    in.agent = s.agent();
    in.step_id = s.step_id();
    int64_t start = s.start_session_ns();
    // A step that starts where the previous one ended on the agent's clock
    // may map a hair earlier (the two times went through different clock
    // model updates, or connections). Each mapping lies within its own
    // stated uncertainty of the truth, so two mappings of one instant can
    // differ by up to the sum of both: within that it is the same instant,
    // not an overlap. (Regression: only the new start's uncertainty was
    // allowed, and a reconnect on a loaded machine overlapped by more.)
    if (auto it = last_end_.find(s.agent()); it != last_end_.end() && start < it->second.end_ns) {
      const int64_t allowed =
          std::max<int64_t>(SaturatingAdd(s.uncertainty_ns(), it->second.uncertainty_ns),
                            1'000'000);
      if (it->second.end_ns - start <= allowed) start = it->second.end_ns;
    }
    in.start = SessionTime::FromNanos(start);
    if (s.end_session_ns() != 0) {
      in.end = SessionTime::FromNanos(std::max(s.end_session_ns(), start + 1));
      last_end_[s.agent()] = {in.end->nanos(), s.uncertainty_ns()};
    } else {
      last_end_.erase(s.agent());
    }
    agents_.insert(s.agent());
    Emit(engine_->AddStep(in), t, out);
  } else if (r.has_feedback()) {
    const v1::Feedback& f = r.feedback();
    FeedbackInput in{r.sequence(), f.trainer(), f.value(),
                     SessionTime::FromNanos(f.event_session_ns())};
    Emit(engine_->AddFeedback(in), t, out);
  } else if (r.has_session_event() &&
             r.session_event().event() == v1::SessionEvent::KIND_CLOSED) {
    Finish(t, out);
    return;
  }
  if (t > watermark_ns_) {
    watermark_ns_ = t;
    Emit(engine_->AdvanceWatermark(SessionTime::FromNanos(t)), t, out);
  }
}

void CreditDriver::Finish(int64_t end_ns, std::vector<v1::Record>* out) {
  if (!engine_) return;
  // Nothing comes after: end every open step here and settle everything.
  for (const std::string& agent : agents_) {
    Emit(engine_->CloseAgent(agent, SessionTime::FromNanos(end_ns)), end_ns, out);
  }
  Emit(engine_->AdvanceWatermark(SessionTime::FromNanos(std::numeric_limits<int64_t>::max() / 2)),
       end_ns, out);
}

void CreditDriver::Emit(const EngineOutput& o, int64_t written_ns, std::vector<v1::Record>* out) {
  for (const CreditOut& c : o.credits) {
    v1::Record r;
    r.set_written_session_ns(written_ns);
    v1::CreditUpdate* u = r.mutable_credit();
    u->set_feedback_sequence(c.feedback_sequence);
    u->set_step_sequence(c.step_sequence);
    u->set_trainer(c.trainer);
    u->set_agent(c.agent);
    u->set_step_id(c.step_id);
    u->set_credit(c.credit);
    u->set_value(c.value);
    u->set_weight(c.weight);
    u->set_kernel(std::string(c.kernel));
    out->push_back(std::move(r));
  }
  for (const UnmatchedOut& u : o.unmatched) {
    v1::Record r;
    r.set_written_session_ns(written_ns);
    r.mutable_unmatched()->set_feedback_sequence(u.feedback_sequence);
    r.mutable_unmatched()->set_trainer(u.trainer);
    r.mutable_unmatched()->set_reason(u.reason);
    out->push_back(std::move(r));
  }
  for (const RejectedStepOut& s : o.rejected) {
    v1::Record r;
    r.set_written_session_ns(written_ns);
    r.mutable_unmatched()->set_step_sequence(s.step_sequence);
    r.mutable_unmatched()->set_agent(s.agent);
    r.mutable_unmatched()->set_reason(s.reason);
    out->push_back(std::move(r));
  }
  for (const LabelOut& l : o.labels) {
    v1::Record r;
    r.set_written_session_ns(written_ns);
    v1::Label* label = r.mutable_label();
    label->set_step_sequence(l.step_sequence);
    label->set_agent(l.agent);
    label->set_step_id(l.step_id);
    label->set_value(l.value);
    label->set_weight(l.weight);
    label->set_settled(true);
    label->set_start_session_ns(l.start.nanos());
    label->set_end_session_ns(l.end.nanos());
    for (const LabelPartOut& p : l.parts) {
      v1::LabelPart* part = label->add_parts();
      part->set_trainer(p.trainer);
      part->set_value(p.value);
      part->set_weight(p.weight);
    }
    out->push_back(std::move(r));
  }
}

}  // namespace tickmark::rpc

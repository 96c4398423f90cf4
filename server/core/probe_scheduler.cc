#include "server/core/probe_scheduler.h"

#include <algorithm>

namespace tickmark {

ProbeScheduler::ProbeScheduler(Options o) : options_(o) {
  options_.min_interval = std::max(options_.min_interval, Duration::Zero());
  options_.steady_interval = std::max(options_.steady_interval, options_.min_interval);
  options_.max_interval = std::max(options_.max_interval, options_.steady_interval);
  options_.burst = std::max(options_.burst, 0);
}

void ProbeScheduler::Restart(Duration at) {
  started_ = at;
  sent_since_start_ = 0;
  pace_ = options_.adaptive ? Pace::kFast : Pace::kBurst;
  due_ = any_sent_ ? std::max(at, last_sent_ + options_.min_interval) : at;
}

bool ProbeScheduler::Admit(Duration at, const std::function<bool()>& take_token) {
  if (take_token() || !any_sent_) return true;
  pace_ = Pace::kSteady;
  if (at < last_sent_ + options_.steady_interval) {  // an extra: to the steady slot
    due_ = last_sent_ + options_.steady_interval;
    return false;
  }
  // A steady probe with the budget spent: later, but the model needs one at
  // least every max_interval.
  const Duration latest = last_sent_ + options_.max_interval;
  if (at >= latest) return true;
  due_ = std::min(at + options_.steady_interval, latest);
  return false;
}

bool ProbeScheduler::Loose(const ClockEstimate& model) const {
  return model.samples == 0 || !model.drift_fitted ||
         model.drift_error_ppm > options_.target_drift_ppm ||
         model.offset_scatter > options_.target_scatter;
}

Duration ProbeScheduler::Sent(Duration at, const ClockEstimate& model) {
  any_sent_ = true;
  last_sent_ = at;
  ++sent_since_start_;
  Duration interval = options_.steady_interval;
  pace_ = Pace::kSteady;
  if (!options_.adaptive) {
    // The k-th probe of the burst is followed by burst_interval, so the
    // burst holds burst + 1 probes at that spacing.
    if (sent_since_start_ <= options_.burst) {
      interval = options_.burst_interval;
      pace_ = Pace::kBurst;
    }
  } else if (at - started_ < options_.fast_for) {
    interval = options_.fast_interval;
    pace_ = Pace::kFast;
  } else if (at - started_ < options_.boost_within && Loose(model)) {
    interval = options_.boost_interval;
    pace_ = Pace::kBoost;
  }
  interval = std::clamp(interval, options_.min_interval, options_.steady_interval);
  due_ = at + interval;
  return due_;
}

const char* ProbePaceName(ProbeScheduler::Pace p) {
  switch (p) {
    case ProbeScheduler::Pace::kBurst:
      return "burst";
    case ProbeScheduler::Pace::kFast:
      return "fast";
    case ProbeScheduler::Pace::kBoost:
      return "boost";
    case ProbeScheduler::Pace::kSteady:
      return "steady";
  }
  return "unknown";
}

}  // namespace tickmark

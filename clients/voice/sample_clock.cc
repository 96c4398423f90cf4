#include "clients/voice/sample_clock.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <vector>

#include "server/core/clock_model.h"

namespace tickmark::voice {

SampleClock::SampleClock(double nominal_rate, Options options)
    : nominal_period_ns_(1e9 / nominal_rate), options_(options) {}

void SampleClock::Declare(int64_t start_ns) {
  declared_ = start_ns;
  pairs_.clear();
  fit_.reset();
}

void SampleClock::Observe(int64_t index, int64_t captured_by_ns) {
  if (declared_) return;
  if (!pairs_.empty() && index <= pairs_.back().first) {
    // The same pointer seen again: keep the tighter bound.
    if (index == pairs_.back().first && captured_by_ns < pairs_.back().second) {
      pairs_.back().second = captured_by_ns;
      fit_.reset();
    }
    return;
  }
  pairs_.emplace_back(index, captured_by_ns);
  const double window = options_.window_s * 1e9 / nominal_period_ns_;
  while (pairs_.size() > 2 &&
         static_cast<double>(pairs_.back().first - pairs_.front().first) > window) {
    pairs_.pop_front();
  }
  fit_.reset();
}

void SampleClock::Reset() {
  pairs_.clear();
  fit_.reset();
}

const SampleClock::Fit& SampleClock::Current() const {
  if (fit_) return *fit_;
  Fit f;
  f.period = nominal_period_ns_;
  f.index0 = static_cast<double>(pairs_.back().first);
  // Residuals against the nominal line, centred on the newest pair, in ns.
  std::vector<double> x, y;
  x.reserve(pairs_.size());
  y.reserve(pairs_.size());
  const double t_ref = static_cast<double>(pairs_.back().second);
  for (const auto& [i, t] : pairs_) {
    const double dx = static_cast<double>(i) - f.index0;
    x.push_back(dx);
    y.push_back(static_cast<double>(t) - t_ref - dx * nominal_period_ns_);
  }
  const double span_s = -x.front() * nominal_period_ns_ / 1e9;
  if (span_s >= options_.fit_after_s && pairs_.size() >= 3) {
    const Line line = LowerEnvelopeFit(x, y);
    const double max_slope = options_.max_ppm * 1e-6 * nominal_period_ns_;
    const double slope = std::clamp(line.slope, -max_slope, max_slope);
    // The intercept of the clamped line: lowest point under it.
    double intercept = std::numeric_limits<double>::infinity();
    for (size_t k = 0; k < x.size(); ++k) intercept = std::min(intercept, y[k] - slope * x[k]);
    f.period = nominal_period_ns_ + slope;
    f.t0 = t_ref + intercept;
    f.ppm = -slope / nominal_period_ns_ * 1e6;  // a fast card: shorter periods
  } else {
    double intercept = std::numeric_limits<double>::infinity();
    for (double v : y) intercept = std::min(intercept, v);
    f.t0 = t_ref + intercept;
  }
  fit_ = f;
  return *fit_;
}

std::optional<int64_t> SampleClock::TimeOf(int64_t index) const {
  if (declared_) {
    return *declared_ + Round(static_cast<double>(index) * nominal_period_ns_);
  }
  if (pairs_.empty()) return std::nullopt;
  const Fit& f = Current();
  return Round(f.t0 + (static_cast<double>(index) - f.index0) * f.period);
}

double SampleClock::fitted_ppm() const {
  if (declared_ || pairs_.empty()) return 0;
  return Current().ppm;
}

}  // namespace tickmark::voice

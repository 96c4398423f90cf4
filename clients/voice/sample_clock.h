// SampleClock: maps a sample index of an audio stream to CLOCK_MONOTONIC
// nanoseconds, so that an onset found at sample i gets an event time on the
// clock the stream client answers probes with.
//
// Two ways to know it:
//  - declared: the first sample was captured at `start_ns`, and the audio
//    runs at its nominal rate (a file with a declared start time);
//  - observed: pairs (index, t) saying "sample `index` had been captured by
//    monotonic time t" — ALSA's status timestamp with the capture pointer
//    (alsa_source.h), or the time a read() of a pipe returned. Every pair is
//    an upper bound of the true capture time, late by some delay that is
//    never negative, so the clock is the lower envelope of the pairs (the
//    line under all of them with the least summed gap; Moon, Skelly &
//    Towsley, INFOCOM 1999, the fit server/core/clock_model.h also uses).
//    Its slope is the sound card's true rate against the host clock: cards
//    run tens of ppm off (an hour at 100 ppm is 0.36 s), so once the pairs
//    span `fit_after_s` the rate is fitted (clamped to ±max_ppm) from the
//    last `window_s`; before that the nominal rate is used.
// Reset() forgets the observations after a gap in the audio (an overrun),
// when the old line no longer holds.
//
// Not thread-safe: the audio thread owns it.
#ifndef TICKMARK_CLIENTS_VOICE_SAMPLE_CLOCK_H_
#define TICKMARK_CLIENTS_VOICE_SAMPLE_CLOCK_H_

#include <cmath>
#include <cstdint>
#include <deque>
#include <optional>
#include <string>
#include <utility>

namespace tickmark::voice {

// Nearest integer as int64_t, for sample counts (llround gives long long,
// which std::min/max would not mix with int64_t).
inline int64_t Round(double v) { return static_cast<int64_t>(std::llround(v)); }

class SampleClock {
 public:
  struct Options {
    double fit_after_s = 10;
    double window_s = 120;
    double max_ppm = 500;
  };
  explicit SampleClock(double nominal_rate) : SampleClock(nominal_rate, Options{}) {}
  SampleClock(double nominal_rate, Options options);

  // Declared: sample 0 at start_ns; observations are then ignored.
  void Declare(int64_t start_ns);
  void Observe(int64_t index, int64_t captured_by_ns);
  void Reset();

  // Monotonic time of sample `index`; nullopt before a declaration or an
  // observation. Indices outside the observed range are extrapolated.
  std::optional<int64_t> TimeOf(int64_t index) const;
  // The fitted rate error of the audio against the host clock, in ppm
  // (positive: the card delivers samples faster than its nominal rate; 0
  // while the nominal rate is used), and how many pairs are kept.
  double fitted_ppm() const;
  size_t observations() const { return pairs_.size(); }
  bool declared() const { return declared_.has_value(); }

 private:
  struct Fit {
    double index0 = 0;  // centring of the fit
    double t0 = 0;      // line: t = t0 + (index - index0) * period
    double period = 0;  // nanoseconds per sample
    double ppm = 0;
  };
  const Fit& Current() const;

  double nominal_period_ns_;
  Options options_;
  std::optional<int64_t> declared_;
  std::deque<std::pair<int64_t, int64_t>> pairs_;  // (index, t), index rising
  mutable std::optional<Fit> fit_;                 // cache, cleared by changes
};

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_SAMPLE_CLOCK_H_

#include "server/rpc/calibration_builder.h"

#include <algorithm>
#include <cmath>

#include "server/base/strings.h"
#include "server/core/calibration_match.h"
#include "server/core/delay_fit.h"
#include "server/rpc/credit_driver.h"

namespace tickmark::rpc {

namespace v1 = tickmark::v1;

uint64_t CalibrationSeed(const std::string& client_id, const std::string& run) {
  // FNV-1a, 64-bit offset basis and prime (Fowler, Noll, Vo; from memory).
  uint64_t h = 14695981039346656037ull;
  auto mix = [&h](std::string_view s) {
    for (unsigned char c : s) {
      h ^= c;
      h *= 1099511628211ull;
    }
  };
  mix(client_id);
  mix("/");
  mix(run);
  return h;
}

absl::StatusOr<v1::Calibration> BuildCalibration(const std::vector<v1::Record>& events,
                                                 const CalibrationRequest& request) {
  std::vector<CalibrationMove> moves;
  std::vector<uint64_t> move_seq;
  std::vector<CalibrationAnswer> answers;
  std::vector<uint64_t> answer_seq;
  for (const v1::Record& r : events) {
    if (!r.has_calibration_event()) continue;
    const v1::CalibrationEvent& e = r.calibration_event();
    if (e.kind() == v1::CalibrationEvent::KIND_MOVE) {
      moves.push_back({ClientTime::FromNanos(e.at_source_ns()), e.approve(), e.practice()});
      move_seq.push_back(r.sequence());
    } else if (e.kind() == v1::CalibrationEvent::KIND_ANSWER) {
      answers.push_back({ClientTime::FromNanos(e.at_source_ns()), e.approve()});
      answer_seq.push_back(r.sequence());
    }
  }
  const CalibrationMatchResult m = MatchCalibration(moves, answers);
  const uint32_t wanted = request.min_answers == 0 ? kDefaultMinAnswers : request.min_answers;
  if (m.valid < kMinFittedAnswers) {
    return absl::FailedPreconditionError(
        Cat("run '", request.run, "' has ", m.valid, " valid answers (", answers.size(),
            " answers to ", m.moves, " moves); at least ", kMinFittedAnswers,
            " are needed to fit a kernel, ", wanted, " are wanted: nothing stored"));
  }
  DelayFitOptions options;
  options.min_answers = wanted;
  options.bootstrap_resamples = request.bootstrap_resamples;
  options.bootstrap_seed = CalibrationSeed(request.client_id, request.run);
  std::string error;
  auto report = FitDelays(m.delays_seconds, options, &error);
  if (!report) {
    return absl::FailedPreconditionError(Cat("run '", request.run, "': no delay family fits its ",
                                             m.valid, " valid delays (", error,
                                             "): nothing stored"));
  }

  v1::Calibration c;
  c.set_id(request.id);
  c.set_trainer(request.trainer);
  c.set_client_id(request.client_id);
  c.set_client_sequence(request.client_sequence);
  c.set_run(request.run);
  c.set_source_kind(request.source_kind);
  c.set_source_description(request.source_description);
  c.set_moves(static_cast<uint32_t>(m.moves));
  c.set_valid(static_cast<uint32_t>(m.valid));
  c.set_wrong_sign(static_cast<uint32_t>(m.wrong_sign));
  c.set_double_answers(static_cast<uint32_t>(m.double_answers));
  c.set_stray(static_cast<uint32_t>(m.stray));
  c.set_practice_answers(static_cast<uint32_t>(m.practice_answers));
  c.set_missed(static_cast<uint32_t>(m.missed));
  for (const MatchedAnswer& a : m.answers) {
    v1::CalibrationMatch* out = c.add_matches();
    out->set_answer_sequence(answer_seq[a.answer]);
    out->set_outcome(AnswerOutcomeName(a.outcome));
    if (a.move) {
      out->set_move_sequence(move_seq[*a.move]);
      out->set_delay_ns(a.delay.nanos());
    }
  }
  for (double d : m.delays_seconds) c.add_delays_s(d);
  for (const FamilyFit& f : report->fits) {
    v1::CalibrationFit* out = c.add_fits();
    out->set_family(DelayFamilyName(f.family));
    out->set_parameters(static_cast<uint32_t>(f.parameters));
    if (f.kernel) {
      *out->mutable_kernel() = KernelToProto(*f.kernel);
      out->set_kernel_description(f.kernel->Describe());
      out->set_log_likelihood(f.log_likelihood);
      out->set_aic(f.aic);
      out->set_ks_distance(f.ks_distance);
      out->set_mean_s(f.mean_seconds);
      out->set_p90_s(f.p90_seconds);
    } else {
      out->set_error(f.error);
    }
  }
  c.set_chosen(static_cast<uint32_t>(report->chosen));
  const DelayKernel kernel = report->kernel();
  *c.mutable_kernel() = KernelToProto(kernel);
  c.set_kernel_description(kernel.Describe());
  if (report->mean_seconds) {
    c.mutable_mean_interval()->set_low_s(report->mean_seconds->low);
    c.mutable_mean_interval()->set_high_s(report->mean_seconds->high);
  }
  if (report->p90_seconds) {
    c.mutable_p90_interval()->set_low_s(report->p90_seconds->low);
    c.mutable_p90_interval()->set_high_s(report->p90_seconds->high);
  }
  c.set_min_answers(wanted);
  c.set_ks_threshold(report->ks_threshold);
  if (report->too_few_answers) {
    c.add_warnings(Cat("only ", m.valid, " valid answers (", wanted,
                       " wanted): the kernel is uncertain; a longer run narrows it"));
  }
  if (report->poor_fit) {
    const FamilyFit& chosen = report->fits[report->chosen];
    c.add_warnings(Cat("the chosen family (", DelayFamilyName(chosen.family),
                       ") fits poorly: Kolmogorov-Smirnov distance ", chosen.ks_distance, " above ",
                       report->ks_threshold));
  }
  c.set_display_note(request.display_note);
  return c;
}

}  // namespace tickmark::rpc

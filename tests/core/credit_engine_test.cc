// Properties of the CreditEngine. The expected credit of every (feedback,
// step) pair is the published formula F(t_f - s) - F(t_f - e) (docs/architecture.md §5)
// evaluated by tickmark::Credit on the steps' final intervals.
#include "server/core/credit_engine.h"

#include <algorithm>
#include <cstring>
#include <map>
#include <random>
#include <set>
#include <string>
#include <tuple>
#include <vector>

#include <gtest/gtest.h>

namespace tickmark {
namespace {

const SessionTime kBase = SessionTime::FromNanos(1'700'000'000'000'000'000);

SessionTime At(double seconds) { return kBase + Duration::FromSeconds(seconds); }

DelayKernel Kernel(const char* text) {
  auto k = DelayKernel::Parse(text);
  EXPECT_TRUE(k.has_value()) << text;
  return *k;
}

CreditEngine::Options Opts(const char* kernel, double lateness_s) {
  return {Kernel(kernel), Duration::FromSeconds(lateness_s)};
}

void Append(EngineOutput& all, EngineOutput part) {
  for (auto& c : part.credits) all.credits.push_back(std::move(c));
  for (auto& u : part.unmatched) all.unmatched.push_back(std::move(u));
  for (auto& r : part.rejected) all.rejected.push_back(std::move(r));
  for (auto& l : part.labels) all.labels.push_back(std::move(l));
}

bool SameBits(double a, double b) { return std::memcmp(&a, &b, sizeof a) == 0; }

// ---------------------------------------------------------------------------
// A randomised session: two agents, three trainers (one on the default
// kernel), steps and feedback delivered out of order within the lateness the
// engine allows, so no record is late. Seeded mt19937_64, whose output the
// C++ standard fixes, so the scenario is the same everywhere.

struct Event {
  double arrival;  // ordering key (ledger order)
  enum { kStep, kFeedback, kWatermark } kind;
  StepInput step;
  FeedbackInput feedback;
  SessionTime watermark;
};

struct Scenario {
  std::vector<Event> events;                // in ledger order
  std::map<uint64_t, StepInput> steps;      // final intervals, by sequence
  std::map<uint64_t, FeedbackInput> feedback;
  std::map<std::string, SessionTime> final_end;  // CloseAgent time per agent
};

constexpr double kLateness = 1.5;
constexpr double kWatermarkLag = 0.2;

Scenario MakeScenario(uint64_t seed, Duration shift) {
  std::mt19937_64 rng(seed);
  auto uniform = [&](double lo, double hi) {
    return lo + (hi - lo) * static_cast<double>(rng() >> 11) * 0x1.0p-53;
  };
  std::vector<Event> events;
  auto at = [&](double s) { return At(s) + shift; };
  for (const std::string agent : {"rover-a", "rover-b"}) {
    double t = uniform(0, 0.5);
    double last_arrival = 0;
    uint64_t id = 0;
    while (t < 30) {
      const double duration = uniform(0.05, 0.4);
      Event e{};
      e.kind = Event::kStep;
      e.step.agent = agent;
      e.step.step_id = id++;
      e.step.start = at(t);
      if (uniform(0, 1) < 0.2) e.step.end = at(t + duration * 0.7);  // gap after
      last_arrival = std::max(last_arrival, t + uniform(0, 1.0));
      e.arrival = last_arrival;
      events.push_back(e);
      t += duration;
    }
  }
  for (int i = 0; i < 150; ++i) {
    Event e{};
    e.kind = Event::kFeedback;
    const double t_f = uniform(0, 32);
    e.feedback.trainer = "trainer-" + std::to_string(i % 3);
    e.feedback.value = uniform(0, 1) < 0.7 ? 1.0 : -1.0;
    e.feedback.event = at(t_f);
    e.arrival = t_f + uniform(0, 0.8);
    events.push_back(e);
  }
  for (double now = 0.25; now < 34; now += 0.25) {
    Event e{};
    e.kind = Event::kWatermark;
    e.watermark = at(now - kWatermarkLag);
    e.arrival = now;
    events.push_back(e);
  }
  std::stable_sort(events.begin(), events.end(),
                   [](const Event& a, const Event& b) { return a.arrival < b.arrival; });
  Scenario sc;
  uint64_t sequence = 1;
  std::map<std::string, uint64_t> open;  // agent -> sequence of open step
  for (Event& e : events) {
    if (e.kind == Event::kStep) {
      e.step.sequence = sequence++;
      auto it = open.find(e.step.agent);
      if (it != open.end()) sc.steps[it->second].end = e.step.start;
      open.erase(e.step.agent);
      sc.steps[e.step.sequence] = e.step;
      if (!e.step.end) open[e.step.agent] = e.step.sequence;
    } else if (e.kind == Event::kFeedback) {
      e.feedback.sequence = sequence++;
      sc.feedback[e.feedback.sequence] = e.feedback;
    }
  }
  for (const auto& [agent, seq] : open) {
    sc.steps[seq].end = sc.steps[seq].start + Duration::Millis(300);
    sc.final_end[agent] = *sc.steps[seq].end;
  }
  sc.events = std::move(events);
  return sc;
}

CreditEngine MakeEngine() {
  CreditEngine engine(Opts("exponential:2,0.1", kLateness));
  EXPECT_TRUE(engine.SetTrainer("trainer-0", Kernel("uniform:0.2,4.0"), 1.0));
  EXPECT_TRUE(engine.SetTrainer("trainer-1", Kernel("gamma:2,0.28"), 0.5));
  return engine;
}

const DelayKernel& KernelOf(const std::string& trainer) {
  static const DelayKernel def = Kernel("exponential:2,0.1");
  static const DelayKernel t0 = Kernel("uniform:0.2,4.0");
  static const DelayKernel t1 = Kernel("gamma:2,0.28");
  if (trainer == "trainer-0") return t0;
  if (trainer == "trainer-1") return t1;
  return def;
}

EngineOutput Replay(const Scenario& sc, CreditEngine& engine) {
  EngineOutput all;
  for (const Event& e : sc.events) {
    switch (e.kind) {
      case Event::kStep: Append(all, engine.AddStep(e.step)); break;
      case Event::kFeedback: Append(all, engine.AddFeedback(e.feedback)); break;
      case Event::kWatermark: Append(all, engine.AdvanceWatermark(e.watermark)); break;
    }
  }
  for (const auto& [agent, end] : sc.final_end) Append(all, engine.CloseAgent(agent, end));
  Append(all, engine.AdvanceWatermark(SessionTime::FromNanos(INT64_MAX)));
  return all;
}

TEST(CreditEngineTest, RandomSessionMatchesFormulaOnFinalIntervalsExactlyOnce) {
  for (uint64_t seed : {1u, 2u, 3u}) {
    const Scenario sc = MakeScenario(seed, Duration::Zero());
    CreditEngine engine = MakeEngine();
    const EngineOutput out = Replay(sc, engine);
    EXPECT_TRUE(out.rejected.empty());

    std::map<std::pair<uint64_t, uint64_t>, double> emitted;
    for (const CreditOut& c : out.credits) {
      EXPECT_TRUE(emitted.emplace(std::make_pair(c.feedback_sequence, c.step_sequence),
                                  c.credit).second)
          << "credit emitted twice";  // each (feedback, step) once
    }
    size_t expected_pairs = 0;
    std::set<uint64_t> should_match;
    for (const auto& [fseq, f] : sc.feedback) {
      for (const auto& [sseq, s] : sc.steps) {
        const double c = Credit(KernelOf(f.trainer), f.event, s.start, *s.end);
        if (c <= 0) continue;
        ++expected_pairs;
        should_match.insert(fseq);
        auto it = emitted.find({fseq, sseq});
        ASSERT_NE(it, emitted.end()) << "missing credit f=" << fseq << " s=" << sseq;
        EXPECT_TRUE(SameBits(it->second, c));  // docs/architecture.md §5 on final intervals
      }
    }
    EXPECT_EQ(emitted.size(), expected_pairs);
    EXPECT_GT(expected_pairs, 500u);

    // Every feedback ends matched or reported unmatched, exactly once.
    std::set<uint64_t> unmatched;
    for (const UnmatchedOut& u : out.unmatched) {
      EXPECT_TRUE(unmatched.insert(u.feedback_sequence).second);
      EXPECT_EQ(should_match.count(u.feedback_sequence), 0u);
      EXPECT_EQ(u.reason, "no step in reach");
    }
    EXPECT_EQ(unmatched.size() + should_match.size(), sc.feedback.size());
    EXPECT_GT(unmatched.size(), 0u);

    // Every step labelled once; label sums its credits in emission order.
    std::map<uint64_t, std::pair<double, double>> sums;  // value, weight
    for (const CreditOut& c : out.credits) {
      sums[c.step_sequence].first += c.credit * c.value * c.weight;
      sums[c.step_sequence].second += c.credit;
    }
    std::set<uint64_t> labelled;
    for (const LabelOut& l : out.labels) {
      EXPECT_TRUE(labelled.insert(l.step_sequence).second);
      EXPECT_TRUE(SameBits(l.value, sums[l.step_sequence].first));
      EXPECT_TRUE(SameBits(l.weight, sums[l.step_sequence].second));
    }
    EXPECT_EQ(labelled.size(), sc.steps.size());
    // Bounded memory: everything settled or resolved is dropped.
    EXPECT_EQ(engine.pending_steps(), 0u);
    EXPECT_EQ(engine.pending_feedback(), 0u);
  }
}

std::string Transcript(const EngineOutput& out) {
  std::string s;
  auto bits = [](double d) {
    uint64_t u;
    std::memcpy(&u, &d, sizeof u);
    return std::to_string(u);
  };
  for (const auto& c : out.credits) {
    s += "C" + std::to_string(c.feedback_sequence) + "," + std::to_string(c.step_sequence) +
         "," + c.trainer + "," + c.agent + "," + std::to_string(c.step_id) + "," +
         bits(c.credit) + "," + bits(c.value) + "," + bits(c.weight) + "," + std::string(c.kernel) + "\n";
  }
  for (const auto& u : out.unmatched) {
    s += "U" + std::to_string(u.feedback_sequence) + "," + u.trainer + "," + u.reason + "\n";
  }
  for (const auto& l : out.labels) {
    s += "L" + std::to_string(l.step_sequence) + "," + l.agent + "," +
         std::to_string(l.step_id) + "," + bits(l.value) + "," + bits(l.weight);
    for (const auto& p : l.parts) s += "|" + p.trainer + "," + bits(p.value) + "," + bits(p.weight);
    s += "\n";
  }
  return s;
}

TEST(CreditEngineTest, DeterministicBitForBit) {
  const Scenario sc = MakeScenario(7, Duration::Zero());
  CreditEngine first = MakeEngine();
  CreditEngine second = MakeEngine();
  const std::string a = Transcript(Replay(sc, first));
  const std::string b = Transcript(Replay(sc, second));
  EXPECT_FALSE(a.empty());
  EXPECT_EQ(a, b);
}

TEST(CreditEngineTest, ShiftingAllTimesChangesNothing) {
  // The final flush uses the end of time, which is not shifted; everything
  // else moves by an odd number of nanoseconds.
  const Duration shift = Duration::Nanos(86'400'000'000'123);
  CreditEngine first = MakeEngine();
  CreditEngine second = MakeEngine();
  const std::string a = Transcript(Replay(MakeScenario(11, Duration::Zero()), first));
  const std::string b = Transcript(Replay(MakeScenario(11, shift), second));
  EXPECT_EQ(a, b);
}

TEST(CreditEngineTest, CreditOverAPartitionSumsToKernelMass) {
  for (const char* kernel : {"gamma:2,0.28", "uniform:0.2,4.0", "exponential:3,0.05"}) {
    CreditEngine engine(Opts(kernel, 0));
    std::map<uint64_t, SessionTime> starts;
    for (int i = 0; i < 100; ++i) {  // 100 ms steps covering [0, 10 s)
      StepInput s{static_cast<uint64_t>(i + 1), "rover", static_cast<uint64_t>(i),
                  At(0.1 * i), std::nullopt};
      starts[s.sequence] = s.start;
      EXPECT_TRUE(engine.AddStep(s).rejected.empty());
    }
    engine.CloseAgent("rover", At(10.0));
    const SessionTime t_f = At(6.05);
    EngineOutput out = engine.AddFeedback({1000, "trainer", 1.0, t_f});
    const DelayKernel k = Kernel(kernel);
    double total = 0, in_range = 0;
    for (const CreditOut& c : out.credits) {
      total += c.credit;
      if (starts[c.step_sequence] >= At(3.0) && starts[c.step_sequence] < At(5.5)) {
        in_range += c.credit;
      }
    }
    EXPECT_NEAR(total, 1.0, 1e-12) << kernel;  // the cut kernel has mass 1 (docs/architecture.md §5)
    EXPECT_NEAR(in_range, k.CutCdf(t_f - At(3.0)) - k.CutCdf(t_f - At(5.5)), 1e-12)
        << kernel;  // telescoping F(t_f - s) - F(t_f - e)
  }
}

TEST(CreditEngineTest, NeverCreditsAStepThatStartsAtOrAfterTheFeedback) {
  // Zero lower bound: the edge case for "before the step's start".
  CreditEngine engine(Opts("exponential:2", 0));
  std::map<uint64_t, SessionTime> starts;
  EngineOutput all;
  for (int i = 0; i < 40; ++i) {
    StepInput s{static_cast<uint64_t>(i + 1), "rover", static_cast<uint64_t>(i),
                At(0.25 * i), std::nullopt};
    starts[s.sequence] = s.start;
    Append(all, engine.AddStep(s));
  }
  std::map<uint64_t, SessionTime> events;
  for (int i = 0; i < 20; ++i) {
    FeedbackInput f{static_cast<uint64_t>(100 + i), "trainer", 1.0, At(0.5 * i)};  // exactly at step starts
    events[f.sequence] = f.event;
    Append(all, engine.AddFeedback(f));
  }
  Append(all, engine.CloseAgent("rover", At(10.0)));
  Append(all, engine.AdvanceWatermark(SessionTime::FromNanos(INT64_MAX)));
  ASSERT_FALSE(all.credits.empty());
  for (const CreditOut& c : all.credits) {
    EXPECT_LT(starts[c.step_sequence], events[c.feedback_sequence]);  // docs/architecture.md §5: support at delay >= 0
  }
}

TEST(CreditEngineTest, UnmatchedReportedOnceAfterDeadline) {
  CreditEngine engine(Opts("uniform:0.2,4.0", 1.0));
  EXPECT_TRUE(engine.AddFeedback({1, "trainer", 1.0, At(5.0)}).unmatched.empty());
  EXPECT_TRUE(engine.AdvanceWatermark(At(5.999)).unmatched.empty());  // 5 + 1 s not yet passed
  EngineOutput out = engine.AdvanceWatermark(At(6.0));
  ASSERT_EQ(out.unmatched.size(), 1u);
  EXPECT_EQ(out.unmatched[0].feedback_sequence, 1u);
  EXPECT_EQ(out.unmatched[0].trainer, "trainer");
  EXPECT_TRUE(engine.AdvanceWatermark(At(60)).unmatched.empty());  // never twice
  // Arriving already past its deadline with nothing in reach: reported at once.
  out = engine.AddFeedback({2, "trainer", 1.0, At(10.0)});
  ASSERT_EQ(out.unmatched.size(), 1u);
  EXPECT_EQ(out.unmatched[0].feedback_sequence, 2u);
  EXPECT_EQ(engine.pending_feedback(), 0u);
  // Non-finite values are reported, not dropped.
  out = engine.AddFeedback({3, "trainer", NAN, At(70.0)});
  ASSERT_EQ(out.unmatched.size(), 1u);
  EXPECT_EQ(out.unmatched[0].reason, "value not finite");
}

TEST(CreditEngineTest, StepsArrivingAfterTheFeedbackAreCredited) {
  const DelayKernel k = Kernel("uniform:0.2,4.0");
  CreditEngine engine({k, Duration::Seconds(2)});
  EngineOutput out = engine.AddFeedback({1, "trainer", -1.0, At(5.0)});
  EXPECT_TRUE(out.credits.empty());
  EXPECT_TRUE(engine.AdvanceWatermark(At(6.0)).unmatched.empty());
  out = engine.AddStep({2, "rover", 7, At(3.0), At(4.0)});  // explicit end: credited now
  ASSERT_EQ(out.credits.size(), 1u);
  EXPECT_EQ(out.credits[0].step_id, 7u);
  EXPECT_EQ(out.credits[0].credit, Credit(k, At(5.0), At(3.0), At(4.0)));  // docs/architecture.md §5
  EXPECT_EQ(out.credits[0].value, -1.0);
  EXPECT_EQ(out.credits[0].kernel, "uniform(lower=0.2s,upper=4s)");
  out = engine.AddStep({3, "rover", 8, At(4.0), std::nullopt});  // open: held
  EXPECT_TRUE(out.credits.empty());
  out = engine.AddStep({4, "rover", 9, At(4.5), std::nullopt});  // closes [4, 4.5)
  ASSERT_EQ(out.credits.size(), 1u);
  EXPECT_EQ(out.credits[0].step_id, 8u);
  EXPECT_EQ(out.credits[0].credit, Credit(k, At(5.0), At(4.0), At(4.5)));  // final interval
  out = engine.AddStep({5, "rover", 10, At(5.5), std::nullopt});
  EXPECT_EQ(out.credits.size(), 1u);  // [4.5, 5.5) gets the rest of the reach
  EXPECT_EQ(out.credits[0].credit, Credit(k, At(5.0), At(4.5), At(5.5)));
}

TEST(CreditEngineTest, FeedbackHeldOnOpenStepUsesItsFinalEnd) {
  const DelayKernel k = Kernel("gamma:2,0.28");
  CreditEngine engine({k, Duration::Zero()});
  engine.AddStep({1, "rover", 1, At(0.0), std::nullopt});
  EngineOutput out = engine.AddFeedback({2, "trainer", 1.0, At(0.5)});
  EXPECT_TRUE(out.credits.empty());  // its end is still unknown
  // The watermark passing the deadline neither drops nor reports it.
  out = engine.AdvanceWatermark(At(100));
  EXPECT_TRUE(out.unmatched.empty());
  EXPECT_TRUE(out.labels.empty());  // an open step never settles
  out = engine.CloseAgent("rover", At(0.3));
  ASSERT_EQ(out.credits.size(), 1u);
  EXPECT_EQ(out.credits[0].credit, Credit(k, At(0.5), At(0.0), At(0.3)));
  ASSERT_EQ(out.labels.size(), 1u);  // watermark already past end + horizon
  EXPECT_EQ(out.labels[0].weight, out.credits[0].credit);
  EXPECT_EQ(engine.pending_feedback(), 0u);
  EXPECT_EQ(engine.pending_steps(), 0u);
}

TEST(CreditEngineTest, LabelsSettleOnlyAfterEndPlusHorizonPlusLateness) {
  CreditEngine engine(Opts("uniform:0.2,4.0", 0.5));
  engine.AddStep({1, "rover", 1, At(1.0), At(2.0)});
  engine.AddFeedback({2, "trainer", 1.0, At(2.5)});
  // end 2 s + horizon 4 s + lateness 0.5 s = 6.5 s (docs/architecture.md §2 "settled").
  EXPECT_TRUE(engine.AdvanceWatermark(At(6.5) - Duration::Nanos(1)).labels.empty());
  EngineOutput out = engine.AdvanceWatermark(At(6.5));
  ASSERT_EQ(out.labels.size(), 1u);
  EXPECT_EQ(out.labels[0].step_sequence, 1u);
  EXPECT_NEAR(out.labels[0].weight, 1.0 / 3.8, 1e-15);  // 1 s of density 1/3.8
  EXPECT_TRUE(engine.AdvanceWatermark(At(100)).labels.empty());  // once
}

TEST(CreditEngineTest, TwoTrainersWithOwnKernelsAndWeights) {
  const DelayKernel uniform = Kernel("uniform:0.2,4.0");
  const DelayKernel gamma = Kernel("gamma:2,0.28");
  CreditEngine engine(Opts("exponential:1", 0));
  ASSERT_TRUE(engine.SetTrainer("ada", uniform, 1.0));
  ASSERT_TRUE(engine.SetTrainer("bo", gamma, 0.25));
  std::string error;
  EXPECT_FALSE(engine.SetTrainer("cy", gamma, -1, &error));
  EXPECT_FALSE(engine.SetTrainer("cy", gamma, NAN, &error));
  engine.AddStep({1, "rover", 1, At(0.0), At(0.4)});
  engine.AddStep({2, "rover", 2, At(0.4), At(0.8)});
  engine.AddFeedback({3, "bo", -1.0, At(0.9)});
  engine.AddFeedback({4, "ada", 1.0, At(1.0)});
  EngineOutput out = engine.AdvanceWatermark(At(100));
  ASSERT_EQ(out.labels.size(), 2u);
  const LabelOut& l = out.labels[0];
  EXPECT_EQ(l.step_sequence, 1u);
  const double ca = Credit(uniform, At(1.0), At(0.0), At(0.4));
  const double cb = Credit(gamma, At(0.9), At(0.0), At(0.4));
  ASSERT_EQ(l.parts.size(), 2u);  // ordered by trainer
  EXPECT_EQ(l.parts[0].trainer, "ada");
  EXPECT_DOUBLE_EQ(l.parts[0].value, ca * 1.0 * 1.0);
  EXPECT_DOUBLE_EQ(l.parts[0].weight, ca);
  EXPECT_EQ(l.parts[1].trainer, "bo");
  EXPECT_DOUBLE_EQ(l.parts[1].value, cb * -1.0 * 0.25);
  EXPECT_DOUBLE_EQ(l.parts[1].weight, cb);
  EXPECT_DOUBLE_EQ(l.value, ca - 0.25 * cb);  // Σ credit × value × weight
  EXPECT_DOUBLE_EQ(l.weight, ca + cb);        // Σ credit
}

TEST(CreditEngineTest, FeedbackCreditsEveryAgentOnItsOwnTimeline) {
  const DelayKernel k = Kernel("uniform:0.2,4.0");
  CreditEngine engine({k, Duration::Zero()});
  engine.AddStep({1, "rover-a", 1, At(0.0), At(1.0)});
  engine.AddStep({2, "rover-b", 1, At(0.5), At(0.7)});
  EngineOutput out = engine.AddFeedback({3, "trainer", 1.0, At(1.5)});
  ASSERT_EQ(out.credits.size(), 2u);
  EXPECT_EQ(out.credits[0].agent, "rover-a");
  EXPECT_EQ(out.credits[0].credit, Credit(k, At(1.5), At(0.0), At(1.0)));
  EXPECT_EQ(out.credits[1].agent, "rover-b");
  EXPECT_EQ(out.credits[1].credit, Credit(k, At(1.5), At(0.5), At(0.7)));
}

TEST(CreditEngineTest, RejectsStepsThatBreakTheTimeline) {
  CreditEngine engine(Opts("uniform:0.2,4.0", 0));
  EXPECT_TRUE(engine.AddStep({1, "rover", 1, At(1.0), At(2.0)}).rejected.empty());
  EXPECT_TRUE(engine.CheckStep({2, "rover", 2, At(1.5), std::nullopt}).has_value());
  EngineOutput out = engine.AddStep({2, "rover", 2, At(1.5), std::nullopt});  // overlaps
  ASSERT_EQ(out.rejected.size(), 1u);
  EXPECT_EQ(out.rejected[0].step_sequence, 2u);
  EXPECT_EQ(engine.AddStep({3, "rover", 3, At(0.5), std::nullopt}).rejected.size(), 1u);
  EXPECT_EQ(engine.AddStep({4, "other", 1, At(3.0), At(3.0)}).rejected.size(), 1u);
  EXPECT_TRUE(engine.AddStep({5, "rover", 4, At(2.0), std::nullopt}).rejected.empty());
  EXPECT_EQ(engine.pending_steps(), 2u);
}

TEST(CreditEngineTest, FeedbackReachingSettledTimeIsReportedNotPartlyCredited) {
  CreditEngine engine(Opts("uniform:0.2,1.0", 0));
  engine.AddStep({1, "rover", 1, At(0.0), At(1.0)});
  engine.AddStep({2, "rover", 2, At(1.0), std::nullopt});
  EXPECT_EQ(engine.AdvanceWatermark(At(2.0)).labels.size(), 1u);  // [0, 1) settled
  // A wider kernel set later reaches back into settled time.
  ASSERT_TRUE(engine.SetTrainer("slow", Kernel("uniform:0.2,4.0"), 1.0));
  EngineOutput out = engine.AddFeedback({3, "slow", 1.0, At(2.5)});
  EXPECT_TRUE(out.credits.empty());
  ASSERT_EQ(out.unmatched.size(), 1u);
  EXPECT_NE(out.unmatched[0].reason.find("settled"), std::string::npos);
}

}  // namespace
}  // namespace tickmark

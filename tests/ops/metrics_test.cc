// The metrics registry (server/ops/metrics.h) against the Prometheus text
// exposition format, version 0.0.4 (Prometheus docs, "Exposition formats";
// from memory): HELP and TYPE lines, label escaping, cumulative histogram
// buckets with an inclusive upper bound (le), +Inf equal to _count.
// tests/python/test_operations.py parses a real server's output with
// promtool, the outside checker.
#include "server/ops/metrics.h"

#include <gtest/gtest.h>

#include <limits>
#include <thread>
#include <vector>

namespace tickmark::ops {
namespace {

TEST(MetricsTest, CounterWithLabelsRendersHelpTypeAndSample) {
  Registry r;
  CounterFamily& f = r.AddCounter("demo_events_total", "Events seen.", {"kind"});
  f.With({"b"}).Inc(2);
  f.With({"a"}).Inc();
  EXPECT_EQ(r.Render(),
            "# HELP demo_events_total Events seen.\n"
            "# TYPE demo_events_total counter\n"
            "demo_events_total{kind=\"a\"} 1\n"
            "demo_events_total{kind=\"b\"} 2\n");
}

TEST(MetricsTest, LabelValuesAndHelpAreEscaped) {
  // Text format 0.0.4: in label values \ " and line feed are escaped; in
  // HELP only \ and line feed (from memory).
  Registry r;
  r.AddGauge("demo_gauge", "a \\ b\nc", {"v"}).With({"x\"y\\z\nw"}).Set(1.5);
  EXPECT_EQ(r.Render(),
            "# HELP demo_gauge a \\\\ b\\nc\n"
            "# TYPE demo_gauge gauge\n"
            "demo_gauge{v=\"x\\\"y\\\\z\\nw\"} 1.5\n");
}

TEST(MetricsTest, HistogramBucketsAreCumulativeWithInclusiveBounds) {
  Registry r;
  Histogram& h = r.AddHistogram("demo_seconds", "Durations.", {}, {0.5, 1, 2}).With({});
  h.Observe(0.5);  // le="0.5" includes 0.5
  h.Observe(0.7);
  h.Observe(1);
  h.Observe(5);  // only +Inf
  EXPECT_EQ(r.Render(),
            "# HELP demo_seconds Durations.\n"
            "# TYPE demo_seconds histogram\n"
            "demo_seconds_bucket{le=\"0.5\"} 1\n"
            "demo_seconds_bucket{le=\"1\"} 3\n"
            "demo_seconds_bucket{le=\"2\"} 3\n"
            "demo_seconds_bucket{le=\"+Inf\"} 4\n"
            "demo_seconds_sum 7.2000000000000002\n"
            "demo_seconds_count 4\n");
}

TEST(MetricsTest, SpecialValuesUseTheFormatsSpelling) {
  EXPECT_EQ(FormatValue(std::numeric_limits<double>::infinity()), "+Inf");
  EXPECT_EQ(FormatValue(-std::numeric_limits<double>::infinity()), "-Inf");
  EXPECT_EQ(FormatValue(std::numeric_limits<double>::quiet_NaN()), "NaN");
  EXPECT_EQ(FormatValue(42), "42");
  EXPECT_EQ(FormatValue(-0.25), "-0.25");
}

TEST(MetricsTest, RemovedChildrenAndGaugeFunctionsAreNoLongerRendered) {
  Registry r;
  GaugeFamily& lease = r.AddGauge("demo_lease_owned", "Owned.", {"session"});
  lease.With({"s1"}).Set(1);
  lease.With({"s2"}).Set(0);
  lease.Remove({"s1"});
  const int id = r.AddGaugeFunction("demo_queue", "Queued.", [] { return 7.0; });
  std::string text = r.Render();
  EXPECT_EQ(text.find("s1"), std::string::npos);
  EXPECT_NE(text.find("demo_lease_owned{session=\"s2\"} 0\n"), std::string::npos);
  EXPECT_NE(text.find("# TYPE demo_queue gauge\ndemo_queue 7\n"), std::string::npos);
  r.RemoveGaugeFunction(id);
  EXPECT_EQ(r.Render().find("demo_queue"), std::string::npos);
}

TEST(MetricsTest, ConcurrentUpdatesAreAllCounted) {
  Registry r;
  Counter& c = r.AddCounter("demo_total", "n").With({});
  Gauge& g = r.AddGauge("demo_open", "n").With({});
  Histogram& h = r.AddHistogram("demo_h", "n", {}, {1}).With({});
  std::vector<std::thread> threads;
  for (int t = 0; t < 4; ++t) {
    threads.emplace_back([&] {
      for (int i = 0; i < 10000; ++i) {
        c.Inc();
        g.Add(1);
        g.Sub(1);
        h.Observe(0.5);
        if (i % 1000 == 0) r.Render();  // scrapes while counting
      }
    });
  }
  for (auto& t : threads) t.join();
  EXPECT_EQ(c.Value(), 40000u);
  EXPECT_EQ(g.Value(), 0);
  EXPECT_EQ(h.Count(), 40000u);
  EXPECT_EQ(h.Cumulative().front(), 40000u);
}

TEST(MetricsTest, FamiliesRenderInTheOrderAdded) {
  Registry r;
  r.AddGauge("zz_first", "1").With({}).Set(1);
  r.AddCounter("aa_second_total", "2").With({}).Inc();
  const std::string text = r.Render();
  EXPECT_LT(text.find("zz_first"), text.find("aa_second_total"));
}

TEST(MetricsDeathTest, ADuplicateOrMalformedNameIsAProgrammingError) {
  EXPECT_DEATH(
      {
        Registry r;
        r.AddCounter("dup_total", "x");
        r.AddGauge("dup_total", "y");
      },
      "added twice");
  EXPECT_DEATH(
      {
        Registry r;
        r.AddCounter("9bad", "x");
      },
      "bad metric name");
  EXPECT_DEATH(
      {
        Registry r;
        r.AddCounter("ok_total", "x", {"le"});
      },
      "bad label name");
}

}  // namespace
}  // namespace tickmark::ops

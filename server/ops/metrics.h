// A small metrics registry with Prometheus text exposition (format 0.0.4):
// counters, gauges and histograms with fixed buckets, each in a family with
// named labels. Debian ships no Prometheus client library for C++, and the
// server needs only this much.
//
//   Registry& r = Registry::Default();
//   CounterFamily& f = r.AddCounter("tickmark_x_total", "What it counts.", {"kind"});
//   Counter& c = f.With({"feedback"});   // look up once (takes a lock) ...
//   c.Inc();                             // ... then count: one relaxed atomic add
//
// Hot paths hold the Counter/Gauge/Histogram reference they looked up once:
// updates are relaxed atomics, never a lock. Render() (the /metrics answer)
// takes the registry's and each family's lock, never a metric's.
//
// A metric reference stays valid until its family's Remove() of those label
// values (families are never destroyed while the registry lives); only the
// owner of a label set should remove it. Names follow the Prometheus naming
// rules ([a-zA-Z_:][a-zA-Z0-9_:]*, counters end in _total, units in the name:
// _seconds, _bytes, _records); the registry checks names and refuses a
// second family with the same name (a programming error: it aborts).
//
// Thread safety: every method may be called from any thread.
#ifndef TICKMARK_SERVER_OPS_METRICS_H_
#define TICKMARK_SERVER_OPS_METRICS_H_

#include <atomic>
#include <cstdint>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <string>
#include <vector>

namespace tickmark::ops {

// A value that only goes up (or restarts at 0 with the process).
class Counter {
 public:
  void Inc(uint64_t n = 1) { value_.fetch_add(n, std::memory_order_relaxed); }
  uint64_t Value() const { return value_.load(std::memory_order_relaxed); }

 private:
  std::atomic<uint64_t> value_{0};
};

// A value that goes up and down.
class Gauge {
 public:
  void Set(double v) { value_.store(v, std::memory_order_relaxed); }
  void Add(double d) { value_.fetch_add(d, std::memory_order_relaxed); }
  void Sub(double d) { value_.fetch_sub(d, std::memory_order_relaxed); }
  double Value() const { return value_.load(std::memory_order_relaxed); }

 private:
  std::atomic<double> value_{0};
};

// Observations counted into fixed buckets (upper bounds, ascending; +Inf is
// implicit), with their sum. A scrape may see a bucket and the count a few
// observations apart (no lock between them): Prometheus tolerates that.
class Histogram {
 public:
  explicit Histogram(const std::vector<double>* bounds);
  void Observe(double v);
  // Cumulative counts per bound, then +Inf (== count).
  std::vector<uint64_t> Cumulative() const;
  uint64_t Count() const { return count_.load(std::memory_order_relaxed); }
  double Sum() const { return sum_.load(std::memory_order_relaxed); }
  const std::vector<double>& bounds() const { return *bounds_; }

 private:
  const std::vector<double>* const bounds_;           // owned by the family
  std::unique_ptr<std::atomic<uint64_t>[]> buckets_;  // per bound, then +Inf; not cumulative
  std::atomic<uint64_t> count_{0};
  std::atomic<double> sum_{0};
};

// Bucket bounds: `count` bounds from `start`, each `factor` times the last.
std::vector<double> ExponentialBuckets(double start, double factor, int count);

// One metric name with its label names; one child per set of label values.
template <typename M>
class Family {
 public:
  // The child for these label values (as many as label names), made on
  // first use. Takes the family's lock: look up once, keep the reference.
  M& With(const std::vector<std::string>& values);
  // Drops a child: it is no longer rendered and references to it dangle.
  void Remove(const std::vector<std::string>& values);

  const std::string& name() const { return name_; }

 private:
  friend class Registry;
  Family(std::string name, std::string help, std::vector<std::string> labels,
         std::vector<double> bounds = {});
  void Render(std::string* out) const;

  const std::string name_;
  const std::string help_;
  const std::vector<std::string> labels_;
  const std::vector<double> bounds_;  // histograms only
  mutable std::mutex mu_;
  std::map<std::vector<std::string>, std::unique_ptr<M>> children_;  // GUARDED_BY(mu_)
};

using CounterFamily = Family<Counter>;
using GaugeFamily = Family<Gauge>;
using HistogramFamily = Family<Histogram>;

class Registry {
 public:
  Registry() = default;
  Registry(const Registry&) = delete;
  Registry& operator=(const Registry&) = delete;

  // The process-wide registry tickmarkd serves on /metrics.
  static Registry& Default();

  CounterFamily& AddCounter(const std::string& name, const std::string& help,
                            std::vector<std::string> labels = {});
  GaugeFamily& AddGauge(const std::string& name, const std::string& help,
                        std::vector<std::string> labels = {});
  HistogramFamily& AddHistogram(const std::string& name, const std::string& help,
                                std::vector<std::string> labels, std::vector<double> bounds);
  // A gauge without labels whose value is read at scrape time (from the
  // scraping thread: `read` must be thread-safe and quick). Returns an id
  // for RemoveGaugeFunction; the owner of what `read` touches removes it
  // before that goes away.
  int AddGaugeFunction(const std::string& name, const std::string& help,
                       std::function<double()> read);
  void RemoveGaugeFunction(int id);

  // Every family in the Prometheus text format, version 0.0.4
  // (Content-Type kContentType), in the order they were added.
  std::string Render() const;

 private:
  void Claim(const std::string& name);  // aborts on a bad or taken name; mu_ held

  struct GaugeFunction {
    int id;
    std::string name, help;
    std::function<double()> read;
  };
  mutable std::mutex mu_;
  // Each family once, in order (a family is one of the three kinds).
  std::vector<std::unique_ptr<CounterFamily>> counters_;      // GUARDED_BY(mu_)
  std::vector<std::unique_ptr<GaugeFamily>> gauges_;          // GUARDED_BY(mu_)
  std::vector<std::unique_ptr<HistogramFamily>> histograms_;  // GUARDED_BY(mu_)
  std::vector<GaugeFunction> functions_;                      // GUARDED_BY(mu_)
  // Render order: (kind, index) pairs; kind 0 counter, 1 gauge, 2 histogram,
  // 3 function (index = id).
  std::vector<std::pair<int, int>> order_;  // GUARDED_BY(mu_)
  int next_function_id_ = 1;                // GUARDED_BY(mu_)
};

// The Content-Type of Render()'s text.
inline constexpr char kContentType[] = "text/plain; version=0.0.4; charset=utf-8";

// A sample value as the text format writes it (integers without a point,
// +Inf, -Inf, NaN).
std::string FormatValue(double v);
// A label value with \, " and newline escaped (text format 0.0.4).
std::string EscapeLabelValue(const std::string& v);

}  // namespace tickmark::ops

#endif  // TICKMARK_SERVER_OPS_METRICS_H_

#include "server/ops/metrics.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <iostream>

namespace tickmark::ops {
namespace {

// Prometheus data model: metric names [a-zA-Z_:][a-zA-Z0-9_:]*, label names
// [a-zA-Z_][a-zA-Z0-9_]* and not starting with "__" (reserved).
bool ValidName(const std::string& s, bool colons) {
  if (s.empty()) return false;
  for (size_t i = 0; i < s.size(); ++i) {
    const char c = s[i];
    const bool alpha =
        (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || c == '_' || (colons && c == ':');
    if (!alpha && !(i > 0 && c >= '0' && c <= '9')) return false;
  }
  return true;
}

[[noreturn]] void Fail(const std::string& what) {
  std::cerr << "metrics registry: " << what << std::endl;
  std::abort();
}

std::string EscapeHelp(const std::string& v) {
  std::string out;
  for (char c : v) {
    if (c == '\\') {
      out += "\\\\";
    } else if (c == '\n') {
      out += "\\n";
    } else {
      out += c;
    }
  }
  return out;
}

void Header(std::string* out, const std::string& name, const std::string& help, const char* type) {
  *out += "# HELP " + name + " " + EscapeHelp(help) + "\n";
  *out += "# TYPE " + name + " " + type + "\n";
}

// {a="x",b="y"} with an optional extra label (le for histogram buckets).
std::string LabelText(const std::vector<std::string>& names, const std::vector<std::string>& values,
                      const std::string& extra_name = "", const std::string& extra_value = "") {
  if (names.empty() && extra_name.empty()) return "";
  std::string s = "{";
  for (size_t i = 0; i < names.size(); ++i) {
    if (i > 0) s += ",";
    s += names[i] + "=\"" + EscapeLabelValue(values[i]) + "\"";
  }
  if (!extra_name.empty()) {
    if (!names.empty()) s += ",";
    s += extra_name + "=\"" + EscapeLabelValue(extra_value) + "\"";
  }
  return s + "}";
}

void Sample(std::string* out, const std::string& name, const std::string& labels, double v) {
  *out += name + labels + " " + FormatValue(v) + "\n";
}

}  // namespace

std::string FormatValue(double v) {
  if (std::isnan(v)) return "NaN";
  if (std::isinf(v)) return v > 0 ? "+Inf" : "-Inf";
  char buf[64];
  if (v == std::floor(v) && std::fabs(v) < 1e15) {
    std::snprintf(buf, sizeof buf, "%.0f", v);
  } else {
    std::snprintf(buf, sizeof buf, "%.17g", v);
  }
  return buf;
}

std::string EscapeLabelValue(const std::string& v) {
  std::string out;
  for (char c : v) {
    if (c == '\\') {
      out += "\\\\";
    } else if (c == '"') {
      out += "\\\"";
    } else if (c == '\n') {
      out += "\\n";
    } else {
      out += c;
    }
  }
  return out;
}

Histogram::Histogram(const std::vector<double>* bounds)
    : bounds_(bounds), buckets_(new std::atomic<uint64_t>[bounds->size() + 1]) {
  for (size_t i = 0; i <= bounds_->size(); ++i) buckets_[i].store(0, std::memory_order_relaxed);
}

void Histogram::Observe(double v) {
  // Bucket i counts bounds[i-1] < v <= bounds[i] (le is inclusive).
  const size_t i =
      static_cast<size_t>(std::lower_bound(bounds_->begin(), bounds_->end(), v) - bounds_->begin());
  buckets_[i].fetch_add(1, std::memory_order_relaxed);
  sum_.fetch_add(v, std::memory_order_relaxed);
  count_.fetch_add(1, std::memory_order_relaxed);
}

std::vector<uint64_t> Histogram::Cumulative() const {
  std::vector<uint64_t> out(bounds_->size() + 1);
  uint64_t running = 0;
  for (size_t i = 0; i <= bounds_->size(); ++i) {
    running += buckets_[i].load(std::memory_order_relaxed);
    out[i] = running;
  }
  return out;
}

std::vector<double> ExponentialBuckets(double start, double factor, int count) {
  std::vector<double> b;
  double v = start;
  for (int i = 0; i < count; ++i, v *= factor) b.push_back(v);
  return b;
}

template <typename M>
Family<M>::Family(std::string name, std::string help, std::vector<std::string> labels,
                  std::vector<double> bounds)
    : name_(std::move(name)),
      help_(std::move(help)),
      labels_(std::move(labels)),
      bounds_(std::move(bounds)) {
  for (const std::string& l : labels_) {
    if (!ValidName(l, false) || l.rfind("__", 0) == 0 || l == "le" || l == "quantile") {
      Fail("bad label name '" + l + "' in " + name_);
    }
  }
  if (!std::is_sorted(bounds_.begin(), bounds_.end()) ||
      std::adjacent_find(bounds_.begin(), bounds_.end()) != bounds_.end()) {
    Fail("histogram bounds of " + name_ + " must be strictly ascending");
  }
}

template <typename M>
M& Family<M>::With(const std::vector<std::string>& values) {
  if (values.size() != labels_.size()) Fail("wrong number of label values for " + name_);
  std::lock_guard<std::mutex> lock(mu_);
  auto& child = children_[values];
  if (!child) {
    if constexpr (std::is_same_v<M, Histogram>) {
      child = std::make_unique<M>(&bounds_);
    } else {
      child = std::make_unique<M>();
    }
  }
  return *child;
}

template <typename M>
void Family<M>::Remove(const std::vector<std::string>& values) {
  std::lock_guard<std::mutex> lock(mu_);
  children_.erase(values);
}

template <typename M>
void Family<M>::Render(std::string* out) const {
  std::lock_guard<std::mutex> lock(mu_);
  if constexpr (std::is_same_v<M, Counter>) {
    Header(out, name_, help_, "counter");
    for (const auto& [values, c] : children_) {
      Sample(out, name_, LabelText(labels_, values), static_cast<double>(c->Value()));
    }
  } else if constexpr (std::is_same_v<M, Gauge>) {
    Header(out, name_, help_, "gauge");
    for (const auto& [values, g] : children_) {
      Sample(out, name_, LabelText(labels_, values), g->Value());
    }
  } else {
    Header(out, name_, help_, "histogram");
    for (const auto& [values, h] : children_) {
      const std::vector<uint64_t> cumulative = h->Cumulative();
      for (size_t i = 0; i < bounds_.size(); ++i) {
        Sample(out, name_ + "_bucket", LabelText(labels_, values, "le", FormatValue(bounds_[i])),
               static_cast<double>(cumulative[i]));
      }
      // +Inf and _count from the same reading, so they agree.
      const double total = static_cast<double>(cumulative.back());
      Sample(out, name_ + "_bucket", LabelText(labels_, values, "le", "+Inf"), total);
      Sample(out, name_ + "_sum", LabelText(labels_, values), h->Sum());
      Sample(out, name_ + "_count", LabelText(labels_, values), total);
    }
  }
}

template class Family<Counter>;
template class Family<Gauge>;
template class Family<Histogram>;

Registry& Registry::Default() {
  static Registry* r = new Registry();  // never destroyed: metrics outlive every thread
  return *r;
}

void Registry::Claim(const std::string& name) {
  if (!ValidName(name, true)) Fail("bad metric name '" + name + "'");
  auto taken = [&](const auto& families) {
    for (const auto& f : families) {
      if (f->name() == name) return true;
    }
    return false;
  };
  bool dup = taken(counters_) || taken(gauges_) || taken(histograms_);
  for (const GaugeFunction& g : functions_) dup = dup || g.name == name;
  if (dup) Fail("metric '" + name + "' added twice");
}

CounterFamily& Registry::AddCounter(const std::string& name, const std::string& help,
                                    std::vector<std::string> labels) {
  std::lock_guard<std::mutex> lock(mu_);
  Claim(name);
  counters_.emplace_back(new CounterFamily(name, help, std::move(labels)));
  order_.emplace_back(0, static_cast<int>(counters_.size() - 1));
  return *counters_.back();
}

GaugeFamily& Registry::AddGauge(const std::string& name, const std::string& help,
                                std::vector<std::string> labels) {
  std::lock_guard<std::mutex> lock(mu_);
  Claim(name);
  gauges_.emplace_back(new GaugeFamily(name, help, std::move(labels)));
  order_.emplace_back(1, static_cast<int>(gauges_.size() - 1));
  return *gauges_.back();
}

HistogramFamily& Registry::AddHistogram(const std::string& name, const std::string& help,
                                        std::vector<std::string> labels,
                                        std::vector<double> bounds) {
  std::lock_guard<std::mutex> lock(mu_);
  Claim(name);
  histograms_.emplace_back(new HistogramFamily(name, help, std::move(labels), std::move(bounds)));
  order_.emplace_back(2, static_cast<int>(histograms_.size() - 1));
  return *histograms_.back();
}

int Registry::AddGaugeFunction(const std::string& name, const std::string& help,
                               std::function<double()> read) {
  std::lock_guard<std::mutex> lock(mu_);
  Claim(name);
  const int id = next_function_id_++;
  functions_.push_back({id, name, help, std::move(read)});
  order_.emplace_back(3, id);
  return id;
}

void Registry::RemoveGaugeFunction(int id) {
  std::lock_guard<std::mutex> lock(mu_);
  std::erase_if(functions_, [id](const GaugeFunction& g) { return g.id == id; });
  std::erase(order_, std::make_pair(3, id));
}

std::string Registry::Render() const {
  std::string out;
  std::lock_guard<std::mutex> lock(mu_);
  for (const auto& [kind, index] : order_) {
    switch (kind) {
      case 0:
        counters_[static_cast<size_t>(index)]->Render(&out);
        break;
      case 1:
        gauges_[static_cast<size_t>(index)]->Render(&out);
        break;
      case 2:
        histograms_[static_cast<size_t>(index)]->Render(&out);
        break;
      default:
        for (const GaugeFunction& g : functions_) {
          if (g.id != index) continue;
          Header(&out, g.name, g.help, "gauge");
          Sample(&out, g.name, "", g.read());
        }
    }
  }
  return out;
}

}  // namespace tickmark::ops

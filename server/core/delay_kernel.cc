#include "server/core/delay_kernel.h"

#include <algorithm>
#include <charconv>
#include <cmath>
#include <cstdint>
#include <limits>
#include <utility>

#include <boost/math/distributions/lognormal.hpp>
#include <boost/math/policies/policy.hpp>
#include <boost/math/special_functions/gamma.hpp>

#include "server/core/ex_gaussian.h"
#include "server/core/internal/boost_policy.h"

namespace tickmark {
namespace {

using KernelPolicy = internal::FastNoThrowPolicy;

bool Fail(std::string* error, std::string message) {
  if (error != nullptr) *error = std::move(message);
  return false;
}

std::string FormatDouble(double v) {
  char buf[64];
  auto r = std::to_chars(buf, buf + sizeof(buf), v);
  return std::string(buf, r.ptr);
}

// Exact decimal seconds from integer nanoseconds ("0.28", "4", "-0.000001").
std::string FormatSeconds(Duration d) {
  int64_t ns = d.nanos();
  std::string out;
  // Work in unsigned so that INT64_MIN has a magnitude.
  uint64_t mag = ns < 0 ? uint64_t{0} - static_cast<uint64_t>(ns)
                        : static_cast<uint64_t>(ns);
  if (ns < 0) out.push_back('-');
  out += std::to_string(mag / 1000000000u);
  uint64_t frac = mag % 1000000000u;
  if (frac != 0) {
    std::string digits = std::to_string(frac);
    digits.insert(0, 9 - digits.size(), '0');
    while (digits.back() == '0') digits.pop_back();
    out += '.';
    out += digits;
  }
  return out;
}

std::string_view Trim(std::string_view s) {
  while (!s.empty() && (s.front() == ' ' || s.front() == '\t')) s.remove_prefix(1);
  while (!s.empty() && (s.back() == ' ' || s.back() == '\t')) s.remove_suffix(1);
  return s;
}

std::optional<double> ParseDouble(std::string_view s) {
  s = Trim(s);
  if (!s.empty() && s.front() == '+') s.remove_prefix(1);
  double v = 0;
  auto r = std::from_chars(s.data(), s.data() + s.size(), v);
  if (r.ec != std::errc() || r.ptr != s.data() + s.size() || !std::isfinite(v)) {
    return std::nullopt;
  }
  return v;
}

// Seconds to Duration. Plain decimals with up to 9 fractional digits are
// converted exactly (so Describe() output round-trips); other forms go
// through double and round to the nanosecond.
std::optional<Duration> ParseSeconds(std::string_view s) {
  s = Trim(s);
  if (!s.empty() && s.back() == 's') s = Trim(s.substr(0, s.size() - 1));
  std::string_view body = s;
  bool negative = false;
  if (!body.empty() && (body.front() == '-' || body.front() == '+')) {
    negative = body.front() == '-';
    body.remove_prefix(1);
  }
  size_t dot = body.find('.');
  std::string_view whole = body.substr(0, dot);
  std::string_view frac =
      dot == std::string_view::npos ? std::string_view() : body.substr(dot + 1);
  auto all_digits = [](std::string_view t) {
    return std::all_of(t.begin(), t.end(),
                       [](char c) { return c >= '0' && c <= '9'; });
  };
  if (!body.empty() && all_digits(whole) && all_digits(frac) &&
      frac.size() <= 9 && whole.size() <= 9 && !(whole.empty() && frac.empty())) {
    int64_t ns = 0;
    for (char c : whole) ns = ns * 10 + (c - '0');
    int64_t f = 0;
    for (size_t i = 0; i < 9; ++i) {
      f = f * 10 + (i < frac.size() ? frac[i] - '0' : 0);
    }
    ns = ns * 1000000000 + f;
    return Duration::Nanos(negative ? -ns : ns);
  }
  std::optional<double> v = ParseDouble(s);
  if (!v || std::abs(*v) > 1e9) return std::nullopt;
  return Duration::FromSeconds(*v);
}

// Splits at commas that are not inside [...].
std::vector<std::string_view> SplitTopLevel(std::string_view s) {
  std::vector<std::string_view> parts;
  int depth = 0;
  size_t begin = 0;
  for (size_t i = 0; i < s.size(); ++i) {
    if (s[i] == '[') ++depth;
    if (s[i] == ']') --depth;
    if (s[i] == ',' && depth == 0) {
      parts.push_back(Trim(s.substr(begin, i - begin)));
      begin = i + 1;
    }
  }
  parts.push_back(Trim(s.substr(begin)));
  return parts;
}

// Converts a delay in seconds to a Duration if it is below kMaxHorizon.
std::optional<Duration> BoundedSeconds(double seconds) {
  if (!std::isfinite(seconds) || seconds < 0 ||
      seconds > DelayKernel::kMaxHorizon.seconds()) {
    return std::nullopt;
  }
  return Duration::FromSeconds(seconds);
}

}  // namespace

std::optional<DelayKernel> DelayKernel::Uniform(Duration lower, Duration upper,
                                                std::string* error) {
  DelayKernel k;
  k.kind_ = Kind::kUniform;
  k.a_ = lower;
  k.b_ = upper;
  if (!k.Finish(error)) return std::nullopt;
  return k;
}

std::optional<DelayKernel> DelayKernel::Gamma(double shape,
                                              double scale_seconds,
                                              Duration shift,
                                              double horizon_quantile,
                                              std::string* error) {
  DelayKernel k;
  k.kind_ = Kind::kGamma;
  k.shape_ = shape;
  k.scale_s_ = scale_seconds;
  k.shift_ = shift;
  k.q_ = horizon_quantile;
  if (!k.Finish(error)) return std::nullopt;
  return k;
}

std::optional<DelayKernel> DelayKernel::Exponential(double rate_per_second,
                                                    Duration shift,
                                                    double horizon_quantile,
                                                    std::string* error) {
  DelayKernel k;
  k.kind_ = Kind::kExponential;
  k.rate_ = rate_per_second;
  k.shift_ = shift;
  k.q_ = horizon_quantile;
  if (!k.Finish(error)) return std::nullopt;
  return k;
}

std::optional<DelayKernel> DelayKernel::Lognormal(double mu, double sigma,
                                                  Duration shift,
                                                  double horizon_quantile,
                                                  std::string* error) {
  DelayKernel k;
  k.kind_ = Kind::kLognormal;
  k.mu_ = mu;
  k.sigma_ = sigma;
  k.shift_ = shift;
  k.q_ = horizon_quantile;
  if (!k.Finish(error)) return std::nullopt;
  return k;
}

std::optional<DelayKernel> DelayKernel::ExGaussian(double mu_seconds,
                                                   double sigma_seconds,
                                                   double tau_seconds,
                                                   double horizon_quantile,
                                                   std::string* error) {
  DelayKernel k;
  k.kind_ = Kind::kExGaussian;
  k.mu_ = mu_seconds;
  k.sigma_ = sigma_seconds;
  k.tau_s_ = tau_seconds;
  k.q_ = horizon_quantile;
  if (!k.Finish(error)) return std::nullopt;
  return k;
}

std::optional<DelayKernel> DelayKernel::Empirical(Duration first_edge,
                                                  Duration bin_width,
                                                  std::vector<double> counts,
                                                  std::string* error) {
  DelayKernel k;
  k.kind_ = Kind::kEmpirical;
  k.first_edge_ = first_edge;
  k.bin_width_ = bin_width;
  k.counts_ = std::move(counts);
  if (!k.Finish(error)) return std::nullopt;
  return k;
}

bool DelayKernel::Finish(std::string* error) {
  const bool unbounded = kind_ == Kind::kGamma || kind_ == Kind::kExponential ||
                         kind_ == Kind::kLognormal || kind_ == Kind::kExGaussian;
  if (unbounded) {
    if (!(q_ > 0 && q_ < 1)) {
      return Fail(error, "horizon quantile must be in (0, 1)");
    }
    if (shift_ < Duration::Zero() || shift_ > kMaxHorizon) {
      return Fail(error, "shift must be in [0, 86400 s]");
    }
  }
  switch (kind_) {
    case Kind::kUniform: {
      if (a_ < Duration::Zero()) return Fail(error, "uniform lower bound < 0");
      if (b_ <= a_) return Fail(error, "uniform needs lower < upper");
      if (b_ > kMaxHorizon) return Fail(error, "uniform upper bound > 86400 s");
      lower_ = a_;
      horizon_ = b_;
      cdf_at_horizon_ = 1.0;
      return true;
    }
    case Kind::kGamma: {
      if (!std::isfinite(shape_) || shape_ <= 0) {
        return Fail(error, "gamma shape must be finite and > 0");
      }
      if (!std::isfinite(scale_s_) || scale_s_ <= 0) {
        return Fail(error, "gamma scale must be finite and > 0");
      }
      double x = boost::math::gamma_p_inv(shape_, q_, KernelPolicy());
      std::optional<Duration> width = BoundedSeconds(scale_s_ * x);
      if (!width || shift_ + *width > kMaxHorizon) {
        return Fail(error, "gamma horizon not finite or > 86400 s");
      }
      lower_ = shift_;
      horizon_ = shift_ + *width;
      break;
    }
    case Kind::kExponential: {
      if (!std::isfinite(rate_) || rate_ <= 0) {
        return Fail(error, "exponential rate must be finite and > 0");
      }
      std::optional<Duration> width = BoundedSeconds(-std::log1p(-q_) / rate_);
      if (!width || shift_ + *width > kMaxHorizon) {
        return Fail(error, "exponential horizon > 86400 s");
      }
      lower_ = shift_;
      horizon_ = shift_ + *width;
      break;
    }
    case Kind::kLognormal: {
      if (!std::isfinite(mu_)) return Fail(error, "lognormal mu must be finite");
      if (!std::isfinite(sigma_) || sigma_ <= 0) {
        return Fail(error, "lognormal sigma must be finite and > 0");
      }
      std::optional<Duration> width = BoundedSeconds(boost::math::quantile(
          boost::math::lognormal_distribution<double, KernelPolicy>(mu_, sigma_), q_));
      if (!width || shift_ + *width > kMaxHorizon) {
        return Fail(error, "lognormal horizon not finite or > 86400 s");
      }
      lower_ = shift_;
      horizon_ = shift_ + *width;
      break;
    }
    case Kind::kExGaussian: {
      if (!std::isfinite(mu_) || std::abs(mu_) > kMaxHorizon.seconds()) {
        return Fail(error, "exgauss mu must be finite and within 86400 s");
      }
      if (!std::isfinite(sigma_) || sigma_ <= 0 || !std::isfinite(tau_s_) ||
          tau_s_ <= 0) {
        return Fail(error, "exgauss sigma and tau must be finite and > 0");
      }
      exg_below_zero_ = ExGaussianCdf(0, mu_, sigma_, tau_s_);
      if (!(exg_below_zero_ <= 0.5)) {
        return Fail(error, "exgauss puts more than half its mass below zero delay");
      }
      std::optional<Duration> width = BoundedSeconds(ExGaussianQuantile(
          exg_below_zero_ + q_ * (1 - exg_below_zero_), mu_, sigma_, tau_s_));
      if (!width || *width > kMaxHorizon) {
        return Fail(error, "exgauss horizon not finite or > 86400 s");
      }
      lower_ = Duration::Zero();
      horizon_ = *width;
      break;
    }
    case Kind::kEmpirical: {
      if (first_edge_ < Duration::Zero()) {
        return Fail(error, "empirical first edge < 0");
      }
      if (bin_width_ <= Duration::Zero()) {
        return Fail(error, "empirical bin width must be > 0");
      }
      if (counts_.empty() || counts_.size() > kMaxEmpiricalBins) {
        return Fail(error, "empirical needs 1 to 65536 bins");
      }
      if (first_edge_ > kMaxHorizon ||
          static_cast<int64_t>(counts_.size()) >
              (kMaxHorizon - first_edge_).nanos() / bin_width_.nanos()) {
        return Fail(error, "empirical histogram ends after 86400 s");
      }
      double total = 0;
      for (double c : counts_) {
        if (!std::isfinite(c) || c < 0) {
          return Fail(error, "empirical counts must be finite and >= 0");
        }
        total += c;
      }
      if (!(total > 0) || !std::isfinite(total)) {
        return Fail(error, "empirical counts must not all be zero");
      }
      cum_.assign(counts_.size() + 1, 0.0);
      double run = 0;
      size_t first_nonzero = counts_.size(), last_nonzero = 0;
      for (size_t i = 0; i < counts_.size(); ++i) {
        run += counts_[i];
        cum_[i + 1] = run / total;
        if (counts_[i] > 0) {
          first_nonzero = std::min(first_nonzero, i);
          last_nonzero = i;
        }
      }
      // Exactly 1 from the last non-empty bin on, whatever the rounding.
      for (size_t i = last_nonzero + 1; i < cum_.size(); ++i) cum_[i] = 1.0;
      lower_ = first_edge_ + bin_width_ * static_cast<int64_t>(first_nonzero);
      horizon_ = first_edge_ + bin_width_ * static_cast<int64_t>(last_nonzero + 1);
      cdf_at_horizon_ = 1.0;
      return true;
    }
  }
  if (horizon_ <= lower_) {
    return Fail(error, "horizon must lie after the lower bound");
  }
  cdf_at_horizon_ = Cdf(horizon_);
  if (!(cdf_at_horizon_ > 0)) return Fail(error, "kernel has no mass");
  return true;
}

double DelayKernel::Cdf(Duration d) const {
  switch (kind_) {
    case Kind::kUniform:
      if (d <= a_) return 0.0;
      if (d >= b_) return 1.0;
      return static_cast<double>((d - a_).nanos()) /
             static_cast<double>((b_ - a_).nanos());
    case Kind::kGamma: {
      if (d <= shift_) return 0.0;
      double p = boost::math::gamma_p(shape_, (d - shift_).seconds() / scale_s_,
                                      KernelPolicy());
      return std::isfinite(p) ? p : 1.0;
    }
    case Kind::kExponential:
      if (d <= shift_) return 0.0;
      return -std::expm1(-rate_ * (d - shift_).seconds());
    case Kind::kEmpirical: {
      if (d <= first_edge_) return 0.0;
      int64_t offset = (d - first_edge_).nanos();
      int64_t width = bin_width_.nanos();
      int64_t bin = offset / width;
      if (bin >= static_cast<int64_t>(counts_.size())) return 1.0;
      size_t i = static_cast<size_t>(bin);
      double frac = static_cast<double>(offset % width) /
                    static_cast<double>(width);
      return cum_[i] + (cum_[i + 1] - cum_[i]) * frac;
    }
    case Kind::kLognormal: {
      if (d <= shift_) return 0.0;
      return boost::math::cdf(
          boost::math::lognormal_distribution<double, KernelPolicy>(mu_, sigma_),
          (d - shift_).seconds());
    }
    case Kind::kExGaussian: {
      if (d <= Duration::Zero()) return 0.0;
      const double g = ExGaussianCdf(d.seconds(), mu_, sigma_, tau_s_);
      return std::max(0.0, (g - exg_below_zero_) / (1 - exg_below_zero_));
    }
  }
  return 0.0;
}

double DelayKernel::CutCdf(Duration d) const {
  if (d <= lower_) return 0.0;
  if (d >= horizon_) return 1.0;
  // Clamped: the incomplete gamma just below the horizon can come out an ulp
  // above its value at the horizon (shape 0.003, found by fuzz/delay_kernel),
  // and the cut CDF must stay within [0, 1] and monotone.
  return std::min(Cdf(d) / cdf_at_horizon_, 1.0);
}

Duration DelayKernel::Quantile(double p) const {
  p = std::clamp(p, 0.0, 1.0);
  switch (kind_) {
    case Kind::kUniform:
      return a_ + Duration::Nanos(static_cast<int64_t>(
                      std::llround(p * static_cast<double>((b_ - a_).nanos()))));
    case Kind::kGamma: {
      double x = boost::math::gamma_p_inv(shape_, p, KernelPolicy());
      if (!std::isfinite(x)) return Duration::Max();
      return shift_ + Duration::FromSeconds(std::min(scale_s_ * x, 1e9));
    }
    case Kind::kExponential: {
      double x = -std::log1p(-p) / rate_;
      if (!std::isfinite(x)) return Duration::Max();
      return shift_ + Duration::FromSeconds(std::min(x, 1e9));
    }
    case Kind::kEmpirical: {
      if (p <= 0) return lower_;
      auto it = std::lower_bound(cum_.begin() + 1, cum_.end(), p);
      if (it == cum_.end()) return horizon_;
      size_t i = static_cast<size_t>(it - cum_.begin()) - 1;  // bin index
      double within = (p - cum_[i]) / (cum_[i + 1] - cum_[i]);
      return first_edge_ + bin_width_ * static_cast<int64_t>(i) +
             Duration::Nanos(static_cast<int64_t>(std::llround(
                 within * static_cast<double>(bin_width_.nanos()))));
    }
    case Kind::kLognormal: {
      if (p <= 0) return shift_;
      if (p >= 1) return Duration::Max();
      double x = boost::math::quantile(
          boost::math::lognormal_distribution<double, KernelPolicy>(mu_, sigma_), p);
      if (!std::isfinite(x)) return Duration::Max();
      return shift_ + Duration::FromSeconds(std::min(x, 1e9));
    }
    case Kind::kExGaussian: {
      if (p <= 0) return Duration::Zero();
      if (p >= 1) return Duration::Max();
      double x = ExGaussianQuantile(exg_below_zero_ + p * (1 - exg_below_zero_),
                                    mu_, sigma_, tau_s_);
      if (!std::isfinite(x)) return Duration::Max();
      return Duration::FromSeconds(std::clamp(x, 0.0, 1e9));
    }
  }
  return Duration::Zero();
}

std::string DelayKernel::Describe() const {
  switch (kind_) {
    case Kind::kUniform:
      return "uniform(lower=" + FormatSeconds(a_) + "s,upper=" +
             FormatSeconds(b_) + "s)";
    case Kind::kGamma:
      return "gamma(shape=" + FormatDouble(shape_) + ",scale=" +
             FormatDouble(scale_s_) + "s,shift=" + FormatSeconds(shift_) +
             "s,q=" + FormatDouble(q_) + ")";
    case Kind::kExponential:
      return "exponential(rate=" + FormatDouble(rate_) + "/s,shift=" +
             FormatSeconds(shift_) + "s,q=" + FormatDouble(q_) + ")";
    case Kind::kEmpirical: {
      std::string out = "empirical(first_edge=" + FormatSeconds(first_edge_) +
                        "s,bin_width=" + FormatSeconds(bin_width_) +
                        "s,counts=[";
      for (size_t i = 0; i < counts_.size(); ++i) {
        if (i > 0) out += ',';
        out += FormatDouble(counts_[i]);
      }
      return out + "])";
    }
    case Kind::kLognormal:
      return "lognormal(mu=" + FormatDouble(mu_) + ",sigma=" +
             FormatDouble(sigma_) + ",shift=" + FormatSeconds(shift_) +
             "s,q=" + FormatDouble(q_) + ")";
    case Kind::kExGaussian:
      return "exgauss(mu=" + FormatDouble(mu_) + "s,sigma=" +
             FormatDouble(sigma_) + "s,tau=" + FormatDouble(tau_s_) +
             "s,q=" + FormatDouble(q_) + ")";
  }
  return "";
}

std::optional<DelayKernel> DelayKernel::Parse(std::string_view text,
                                              std::string* error) {
  text = Trim(text);
  size_t cut = text.find_first_of(":(");
  if (cut == std::string_view::npos) {
    Fail(error, "expected kind:params or kind(key=value,...)");
    return std::nullopt;
  }
  std::string_view kind = Trim(text.substr(0, cut));
  const bool named = text[cut] == '(';
  std::string_view body = text.substr(cut + 1);
  if (named) {
    if (body.empty() || body.back() != ')') {
      Fail(error, "missing ')'");
      return std::nullopt;
    }
    body.remove_suffix(1);
  }
  std::vector<std::string_view> tokens = SplitTopLevel(body);

  // Turns both forms into (key, value) pairs; positional tokens get the
  // kind's parameter names in order.
  std::vector<std::string_view> positional_names;
  if (kind == "uniform") {
    positional_names = {"lower", "upper"};
  } else if (kind == "gamma") {
    positional_names = {"shape", "scale", "shift"};
  } else if (kind == "exponential") {
    positional_names = {"rate", "shift"};
  } else if (kind == "empirical") {
    positional_names = {"first_edge", "bin_width"};
  } else if (kind == "lognormal") {
    positional_names = {"mu", "sigma", "shift"};
  } else if (kind == "exgauss") {
    positional_names = {"mu", "sigma", "tau"};
  } else {
    Fail(error, "unknown kernel kind '" + std::string(kind) + "'");
    return std::nullopt;
  }
  std::vector<std::pair<std::string_view, std::string_view>> params;
  std::vector<double> counts;
  bool have_counts = false;
  bool seen_named = false;
  for (size_t i = 0; i < tokens.size(); ++i) {
    std::string_view tok = tokens[i];
    size_t eq = tok.find('=');
    if (eq != std::string_view::npos) {
      seen_named = true;
      params.emplace_back(Trim(tok.substr(0, eq)), Trim(tok.substr(eq + 1)));
      continue;
    }
    if (named || seen_named) {
      Fail(error, "positional value '" + std::string(tok) + "' after key=value");
      return std::nullopt;
    }
    if (i < positional_names.size()) {
      params.emplace_back(positional_names[i], tok);
    } else if (kind == "empirical") {
      std::optional<double> c = ParseDouble(tok);
      if (!c) {
        Fail(error, "bad count '" + std::string(tok) + "'");
        return std::nullopt;
      }
      counts.push_back(*c);
      have_counts = true;
    } else {
      Fail(error, "too many values for " + std::string(kind));
      return std::nullopt;
    }
  }

  std::optional<double> shape, scale, rate, mu, sigma, tau;
  const bool lognormal = kind == "lognormal";
  const bool exgauss = kind == "exgauss";
  // A double with an optional trailing unit ("0.3s") as Describe() prints.
  auto number = [](std::string_view v, std::string_view unit) {
    if (!unit.empty() && v.size() >= unit.size() &&
        v.substr(v.size() - unit.size()) == unit) {
      v.remove_suffix(unit.size());
    }
    return ParseDouble(v);
  };
  std::optional<Duration> lower, upper, shift, first_edge, bin_width;
  double q = kDefaultHorizonQuantile;
  // Not a structured binding: clang 14 (the fuzz build) cannot capture one
  // in a lambda.
  for (const auto& param : params) {
    const auto& key = param.first;
    const auto& value = param.second;
    bool ok = true;
    auto seconds = [&](std::optional<Duration>& out) {
      out = ParseSeconds(value);
      ok = out.has_value();
    };
    if (key == "lower" && kind == "uniform") {
      seconds(lower);
    } else if (key == "upper" && kind == "uniform") {
      seconds(upper);
    } else if (key == "shape" && kind == "gamma") {
      shape = ParseDouble(value);
      ok = shape.has_value();
    } else if (key == "scale" && kind == "gamma") {
      std::string_view v = value;
      if (!v.empty() && v.back() == 's') v.remove_suffix(1);
      scale = ParseDouble(v);
      ok = scale.has_value();
    } else if (key == "rate" && kind == "exponential") {
      std::string_view v = value;
      if (v.size() >= 2 && v.substr(v.size() - 2) == "/s") v.remove_suffix(2);
      rate = ParseDouble(v);
      ok = rate.has_value();
    } else if (key == "shift" &&
               (kind == "gamma" || kind == "exponential" || lognormal)) {
      seconds(shift);
    } else if ((key == "mu" || key == "sigma") && (lognormal || exgauss)) {
      (key == "mu" ? mu : sigma) = number(value, exgauss ? "s" : "");
      ok = (key == "mu" ? mu : sigma).has_value();
    } else if (key == "tau" && exgauss) {
      tau = number(value, "s");
      ok = tau.has_value();
    } else if (key == "q" && (kind == "gamma" || kind == "exponential" ||
                              lognormal || exgauss)) {
      std::optional<double> v = ParseDouble(value);
      ok = v.has_value();
      if (v) q = *v;
    } else if (key == "first_edge" && kind == "empirical") {
      seconds(first_edge);
    } else if (key == "bin_width" && kind == "empirical") {
      seconds(bin_width);
    } else if (key == "counts" && kind == "empirical") {
      std::string_view v = value;
      if (v.size() < 2 || v.front() != '[' || v.back() != ']') {
        ok = false;
      } else {
        for (std::string_view c : SplitTopLevel(v.substr(1, v.size() - 2))) {
          std::optional<double> d = ParseDouble(c);
          if (!d) {
            ok = false;
            break;
          }
          counts.push_back(*d);
        }
        have_counts = ok;
      }
    } else {
      Fail(error, "unknown parameter '" + std::string(key) + "' for " +
                      std::string(kind));
      return std::nullopt;
    }
    if (!ok) {
      Fail(error, "bad value '" + std::string(value) + "' for " +
                      std::string(key));
      return std::nullopt;
    }
  }

  auto missing = [&](const char* what) {
    Fail(error, std::string(kind) + " needs " + what);
    return std::nullopt;
  };
  if (kind == "uniform") {
    if (!lower || !upper) return missing("lower and upper");
    return Uniform(*lower, *upper, error);
  }
  if (kind == "gamma") {
    if (!shape || !scale) return missing("shape and scale");
    return Gamma(*shape, *scale, shift.value_or(Duration::Zero()), q, error);
  }
  if (kind == "exponential") {
    if (!rate) return missing("rate");
    return Exponential(*rate, shift.value_or(Duration::Zero()), q, error);
  }
  if (lognormal) {
    if (!mu || !sigma) return missing("mu and sigma");
    return Lognormal(*mu, *sigma, shift.value_or(Duration::Zero()), q, error);
  }
  if (exgauss) {
    if (!mu || !sigma || !tau) return missing("mu, sigma and tau");
    return ExGaussian(*mu, *sigma, *tau, q, error);
  }
  if (!first_edge || !bin_width || !have_counts) {
    return missing("first_edge, bin_width and counts");
  }
  return Empirical(*first_edge, *bin_width, std::move(counts), error);
}

double Credit(const DelayKernel& kernel, SessionTime t_f, SessionTime start,
              SessionTime end) {
  double c = kernel.CutCdf(t_f - start) - kernel.CutCdf(t_f - end);
  return c > 0 ? c : 0.0;
}

}  // namespace tickmark

#include "clients/cli/align.h"

#include <algorithm>
#include <cmath>
#include <cstdlib>
#include <map>
#include <sstream>

#include "server/base/strings.h"

namespace tickmark::cli {
namespace {

constexpr size_t kLocal = 20;    // pulses each side of an anchor that score it
constexpr size_t kAnchors = 24;  // anchors spread over the session

// Index of the value in sorted v nearest to x (v not empty).
size_t Nearest(const std::vector<double>& v, double x) {
  auto it = std::lower_bound(v.begin(), v.end(), x);
  if (it == v.end()) return v.size() - 1;
  if (it == v.begin()) return 0;
  const size_t hi = static_cast<size_t>(it - v.begin());
  return (x - v[hi - 1] <= v[hi] - x) ? hi - 1 : hi;
}

struct Score {
  size_t hits = 0;
  double sse = 0;
};

Score ScoreOffset(const std::vector<double>& s, const std::vector<double>& o, size_t lo, size_t hi,
                  double d, double tol) {
  Score sc;
  for (size_t k = lo; k < hi; ++k) {
    const double want = s[k] + d;
    const double r = o[Nearest(o, want)] - want;
    if (std::abs(r) <= tol) {
      ++sc.hits;
      sc.sse += r * r;
    }
  }
  return sc;
}

// Pairs session pulses [lo, hi) with other pulses through a + b·s, each
// other pulse once (the closer pair kept).
std::vector<AlignPair> Pair(const std::vector<double>& s, const std::vector<double>& o, size_t lo,
                            size_t hi, double a, double b, double tol) {
  std::map<size_t, AlignPair> by_other;
  for (size_t k = lo; k < hi; ++k) {
    const double want = a + b * s[k];
    const size_t j = Nearest(o, want);
    const double r = o[j] - want;
    if (std::abs(r) > tol) continue;
    auto [it, fresh] = by_other.try_emplace(j);
    if (!fresh && std::abs(it->second.residual_s) <= std::abs(r)) continue;
    it->second = AlignPair{k, j, s[k], o[j], r};
  }
  std::vector<AlignPair> pairs;
  for (auto& [j, p] : by_other) pairs.push_back(p);
  std::sort(pairs.begin(), pairs.end(), [](const AlignPair& x, const AlignPair& y) {
    return x.session_index < y.session_index;
  });
  return pairs;
}

bool FitPairs(const std::vector<AlignPair>& pairs, AlignResult* r) {
  std::vector<double> x, y;
  for (const AlignPair& p : pairs) {
    x.push_back(p.session_s);
    y.push_back(p.other_s);
  }
  return FitLine(x, y, &r->a, &r->b, &r->a_se, &r->b_se);
}

bool ParseDouble(std::string cell, double* out) {
  while (!cell.empty() && (cell.back() == ' ' || cell.back() == '\t' || cell.back() == '\r')) {
    cell.pop_back();
  }
  size_t start = cell.find_first_not_of(" \t\"");
  if (start == std::string::npos) return false;
  cell = cell.substr(start);
  if (!cell.empty() && cell.back() == '"') cell.pop_back();
  if (cell.empty()) return false;
  char* end = nullptr;
  const double v = std::strtod(cell.c_str(), &end);
  if (end == cell.c_str() || *end != '\0' || !std::isfinite(v)) return false;
  *out = v;
  return true;
}

std::vector<std::string> SplitCsv(const std::string& line) {
  std::vector<std::string> cells;
  std::string cur;
  bool quoted = false;
  for (char c : line) {
    if (c == '"') {
      quoted = !quoted;
    } else if (c == ',' && !quoted) {
      cells.push_back(cur);
      cur.clear();
    } else {
      cur += c;
    }
  }
  cells.push_back(cur);
  return cells;
}

std::string Trim(std::string s) {
  while (!s.empty() && (s.back() == ' ' || s.back() == '\r' || s.back() == '\t')) s.pop_back();
  size_t i = s.find_first_not_of(" \t");
  return i == std::string::npos ? std::string() : s.substr(i);
}

}  // namespace

bool FitLine(const std::vector<double>& x, const std::vector<double>& y, double* a, double* b,
             double* a_se, double* b_se) {
  const size_t n = x.size();
  if (n < 2 || y.size() != n) return false;
  double mx = 0, my = 0;
  for (size_t i = 0; i < n; ++i) {
    mx += x[i];
    my += y[i];
  }
  mx /= static_cast<double>(n);
  my /= static_cast<double>(n);
  double sxx = 0, sxy = 0;
  for (size_t i = 0; i < n; ++i) {
    sxx += (x[i] - mx) * (x[i] - mx);
    sxy += (x[i] - mx) * (y[i] - my);
  }
  if (!(sxx > 0)) return false;
  *b = sxy / sxx;
  *a = my - *b * mx;
  double sse = 0;
  for (size_t i = 0; i < n; ++i) {
    const double r = y[i] - (*a + *b * x[i]);
    sse += r * r;
  }
  // Standard errors of ordinary least squares (any regression text; the
  // tests compare with scipy.stats.linregress's stderr and intercept_stderr).
  const double s2 = n > 2 ? sse / static_cast<double>(n - 2) : 0.0;
  *b_se = std::sqrt(s2 / sxx);
  *a_se = std::sqrt(s2 * (1.0 / static_cast<double>(n) + mx * mx / sxx));
  return true;
}

absl::StatusOr<AlignResult> AlignPulses(const std::vector<double>& session_in,
                                        const std::vector<double>& other_in,
                                        const AlignOptions& opt) {
  std::vector<double> s = session_in, o = other_in;
  std::sort(s.begin(), s.end());
  std::sort(o.begin(), o.end());
  const size_t need = std::max<size_t>(opt.min_pairs, 3);
  if (s.size() < need || o.size() < need) {
    return absl::FailedPreconditionError(Cat("too few pulses to align: the session has ", s.size(),
                                             ", the other recorder ", o.size(), "; at least ", need,
                                             " must pair up (--min-pairs)"));
  }
  const double tol = opt.tolerance_s;

  // 1. Hypotheses.
  AlignResult best;
  size_t best_anchor = 0;
  double best_d = 0;
  Score best_score;
  size_t runner_up = 0;
  size_t best_window = 0;
  const size_t anchors = std::min(kAnchors, s.size());
  for (size_t a = 0; a < anchors; ++a) {
    const size_t i = anchors == 1 ? 0 : a * (s.size() - 1) / (anchors - 1);
    const size_t lo = i > kLocal ? i - kLocal : 0;
    const size_t hi = std::min(s.size(), i + kLocal + 1);
    Score mine;
    double mine_d = 0;
    std::vector<std::pair<double, size_t>> all;
    for (size_t j = 0; j < o.size(); ++j) {
      const double d = o[j] - s[i];
      const Score sc = ScoreOffset(s, o, lo, hi, d, tol);
      all.emplace_back(d, sc.hits);
      if (sc.hits > mine.hits || (sc.hits == mine.hits && sc.sse < mine.sse)) {
        mine = sc;
        mine_d = d;
      }
    }
    if (mine.hits > best_score.hits ||
        (mine.hits == best_score.hits && mine.sse < best_score.sse)) {
      best_score = mine;
      best_d = mine_d;
      best_anchor = i;
      best_window = hi - lo;
      runner_up = 0;
      for (const auto& [d, hits] : all) {
        if (std::abs(d - mine_d) > 2 * tol) runner_up = std::max(runner_up, hits);
      }
    }
  }
  best.best_score = best_score.hits;
  best.runner_up_score = runner_up;
  if (best_score.hits < 3 || 2 * best_score.hits < best_window) {
    return absl::FailedPreconditionError(
        Cat("no offset pairs most pulses near any anchor (best: ", best_score.hits, " of ",
            best_window, " within ", tol * 1e3,
            " ms); are these the same pulses, in seconds? (--tolerance, --column)"));
  }
  if (static_cast<double>(runner_up) >= opt.ambiguity * static_cast<double>(best_score.hits)) {
    return absl::FailedPreconditionError(
        Cat("the pairing is ambiguous: the best offset pairs ", best_score.hits,
            " pulses near its anchor, another offset ", runner_up,
            "; the pulse train is too regular to tell pulses apart (send jittered pulses, "
            "the tickmark-serial default, or narrow --tolerance)"));
  }

  // 2. Growth.
  double a = best_d, b = 1.0;
  const double anchor_t = s[best_anchor];
  double span =
      std::max(1e-9, std::max(s[std::min(s.size() - 1, best_anchor + kLocal)] - anchor_t,
                              anchor_t - s[best_anchor > kLocal ? best_anchor - kLocal : 0]));
  const double whole = s.back() - s.front();
  std::vector<AlignPair> pairs;
  for (int round = 0; round < 64; ++round) {
    const size_t lo =
        static_cast<size_t>(std::lower_bound(s.begin(), s.end(), anchor_t - span) - s.begin());
    const size_t hi =
        static_cast<size_t>(std::upper_bound(s.begin(), s.end(), anchor_t + span) - s.begin());
    std::vector<AlignPair> next = Pair(s, o, lo, hi, a, b, tol);
    AlignResult fit;
    if (next.size() >= 3 && FitPairs(next, &fit)) {
      a = fit.a;
      b = fit.b;
    }
    const bool covers = anchor_t - span <= s.front() && anchor_t + span >= s.back();
    const bool same =
        next.size() == pairs.size() && std::equal(next.begin(), next.end(), pairs.begin(),
                                                  [](const AlignPair& x, const AlignPair& y) {
                                                    return x.session_index == y.session_index &&
                                                           x.other_index == y.other_index;
                                                  });
    pairs = std::move(next);
    if (covers && same) break;
    span = std::min(span * 2, whole + 1.0);
  }

  // 3. Trim.
  auto refit = [&](std::vector<AlignPair>* ps) -> bool {
    if (!FitPairs(*ps, &best)) return false;
    for (AlignPair& p : *ps) p.residual_s = p.other_s - (best.a + best.b * p.session_s);
    return true;
  };
  if (pairs.size() < need || !refit(&pairs)) {
    return absl::FailedPreconditionError(
        Cat("only ", pairs.size(), " of ", s.size(), " session pulses and ", o.size(),
            " other pulses pair up within ", tol * 1e3, " ms; at least ", need,
            " are needed (--min-pairs, --tolerance)"));
  }
  std::vector<double> abs_r;
  for (const AlignPair& p : pairs) abs_r.push_back(std::abs(p.residual_s));
  std::nth_element(abs_r.begin(), abs_r.begin() + static_cast<long>(abs_r.size() / 2), abs_r.end());
  const double sigma = 1.4826 * abs_r[abs_r.size() / 2];  // MAD of a normal sample
  const double cut = std::max(5 * sigma, tol / 100);
  std::vector<AlignPair> kept;
  for (const AlignPair& p : pairs) {
    if (std::abs(p.residual_s) <= cut) kept.push_back(p);
  }
  best.trimmed = pairs.size() - kept.size();
  if (kept.size() < need || !refit(&kept)) {
    return absl::FailedPreconditionError(Cat("only ", kept.size(),
                                             " pairs are left after dropping outliers; at least ",
                                             need, " are needed (--min-pairs)"));
  }
  double sse = 0;
  best.max_abs_s = 0;
  for (const AlignPair& p : kept) {
    sse += p.residual_s * p.residual_s;
    best.max_abs_s = std::max(best.max_abs_s, std::abs(p.residual_s));
  }
  best.rms_s = std::sqrt(sse / static_cast<double>(kept.size()));
  // Map indices back to the caller's order.
  std::vector<size_t> s_order(session_in.size()), o_order(other_in.size());
  for (size_t i = 0; i < s_order.size(); ++i) s_order[i] = i;
  for (size_t i = 0; i < o_order.size(); ++i) o_order[i] = i;
  std::stable_sort(s_order.begin(), s_order.end(),
                   [&](size_t x, size_t y) { return session_in[x] < session_in[y]; });
  std::stable_sort(o_order.begin(), o_order.end(),
                   [&](size_t x, size_t y) { return other_in[x] < other_in[y]; });
  for (AlignPair& p : kept) {
    p.session_index = s_order[p.session_index];
    p.other_index = o_order[p.other_index];
  }
  best.pairs = std::move(kept);
  return best;
}

absl::StatusOr<std::vector<double>> ReadCsvColumn(const std::string& text,
                                                  const std::string& column,
                                                  const std::string& source_name) {
  std::istringstream in(text);
  std::string line;
  int line_no = 0;
  bool first = true;
  long index = 0;  // 0-based
  bool by_name = false;
  if (!column.empty()) {
    char* end = nullptr;
    const long n = std::strtol(column.c_str(), &end, 10);
    if (*end == '\0' && n >= 1) {
      index = n - 1;
    } else {
      by_name = true;
    }
  }
  std::vector<double> out;
  while (std::getline(in, line)) {
    ++line_no;
    const std::string t = Trim(line);
    if (t.empty() || t[0] == '#') continue;
    const std::vector<std::string> cells = SplitCsv(line);
    if (first) {
      first = false;
      if (by_name) {
        auto it = std::find_if(cells.begin(), cells.end(),
                               [&](const std::string& c) { return Trim(c) == column; });
        if (it == cells.end()) {
          return absl::InvalidArgumentError(
              Cat(source_name, ":", line_no, ": no column named '", column, "' in the header"));
        }
        index = it - cells.begin();
        continue;
      }
      double v = 0;
      if (static_cast<size_t>(index) >= cells.size() ||
          !ParseDouble(cells[static_cast<size_t>(index)], &v)) {
        continue;  // a header
      }
    }
    double v = 0;
    if (static_cast<size_t>(index) >= cells.size() ||
        !ParseDouble(cells[static_cast<size_t>(index)], &v)) {
      return absl::InvalidArgumentError(Cat(source_name, ":", line_no, ": column ", index + 1,
                                            " is not a number of seconds: \"", t, "\""));
    }
    out.push_back(v);
  }
  if (by_name && first) {
    return absl::InvalidArgumentError(Cat(source_name, ": empty; no header with '", column, "'"));
  }
  return out;
}

}  // namespace tickmark::cli

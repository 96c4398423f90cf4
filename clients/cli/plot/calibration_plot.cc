#include "clients/cli/plot/calibration_plot.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <optional>
#include <vector>

#include "server/core/delay_kernel.h"

namespace tickmark::cli::plot {
namespace {

namespace v1 = tickmark::v1;

constexpr Rgb kWhite{255, 255, 255};
constexpr Rgb kInk{30, 30, 30};
constexpr Rgb kGrid{225, 225, 225};
constexpr Rgb kBar{200, 200, 200};
constexpr Rgb kBarEdge{150, 150, 150};

// Left, top, right and bottom edges of the plotting area.
constexpr int kLeft = 90, kTop = 50, kRight = kPlotWidth - 30, kBottom = kPlotHeight - 70;

// A "nice" tick step (1, 2 or 5 times a power of ten) giving about `n` ticks over `span`.
double NiceStep(double span, int n) {
  const double raw = span / n;
  const double p = std::pow(10.0, std::floor(std::log10(raw)));
  for (double m : {1.0, 2.0, 5.0, 10.0}) {
    if (m * p >= raw) return m * p;
  }
  return 10 * p;
}

std::string Number(double v, double step) {
  char buf[32];
  const int decimals = step >= 1 ? 0 : static_cast<int>(std::ceil(-std::log10(step) - 1e-9));
  std::snprintf(buf, sizeof buf, "%.*f", decimals, v);
  return buf;
}

// Density of `k` at x seconds: the uncut CDF's central difference.
double Density(const DelayKernel& k, double x, double h) {
  const double lo = std::max(0.0, x - h), hi = x + h;
  return (k.Cdf(Duration::FromSeconds(hi)) - k.Cdf(Duration::FromSeconds(lo))) / (hi - lo);
}

}  // namespace

Rgb FitColour(int i) {
  static constexpr Rgb kPalette[] = {
      {31, 119, 180},   // blue
      {230, 120, 10},   // orange
      {44, 160, 44},    // green
      {214, 39, 40},    // red
      {148, 103, 189},  // purple
      {140, 86, 75},    // brown
      {23, 190, 207},   // cyan
  };
  constexpr int n = static_cast<int>(sizeof kPalette / sizeof kPalette[0]);
  return kPalette[((i % n) + n) % n];
}

Canvas DrawCalibration(const v1::Calibration& cal, std::string* error) {
  Canvas c(kPlotWidth, kPlotHeight, kWhite);
  std::vector<double> delays;
  for (double d : cal.delays_s()) {
    if (std::isfinite(d) && d >= 0) delays.push_back(d);
  }
  std::string title = "calibration " + cal.id() + ", trainer " + cal.trainer() + ": " +
                      std::to_string(delays.size()) + " valid delays";
  c.Text(kLeft, 15, title, kInk, 2);
  if (delays.empty()) {
    if (error) *error = "the calibration has no valid delays to plot";
    c.Text(kLeft, kTop + 40, "no valid delays", kInk, 2);
    return c;
  }
  std::sort(delays.begin(), delays.end());
  const double n = static_cast<double>(delays.size());

  // Kernels of the fits that have one; the x range covers the delays and
  // most of the chosen fit's mass.
  std::vector<std::optional<DelayKernel>> kernels;
  for (const auto& fit : cal.fits()) {
    kernels.push_back(fit.error().empty() && !fit.kernel_description().empty()
                          ? DelayKernel::Parse(fit.kernel_description())
                          : std::nullopt);
  }
  double xmax = delays.back();
  const int chosen = static_cast<int>(cal.chosen());
  if (chosen < static_cast<int>(kernels.size()) && kernels[static_cast<size_t>(chosen)]) {
    xmax = std::max(xmax, kernels[static_cast<size_t>(chosen)]->Quantile(0.99).seconds());
  }
  xmax = std::min(xmax, std::max(delays.back() * 3, 1e-3));  // a long tail must not squash the rest
  const double xstep = NiceStep(xmax, 8);
  xmax = std::ceil(xmax * 1.02 / xstep) * xstep;

  // Histogram, density-scaled: count / (n * width).
  const int bins = std::clamp(static_cast<int>(std::ceil(std::sqrt(n) * 1.5)), 5, 40);
  const double width = xmax / bins;
  std::vector<double> density(static_cast<size_t>(bins), 0.0);
  for (double d : delays) {
    const int b = std::min(bins - 1, static_cast<int>(d / width));
    density[static_cast<size_t>(b)] += 1.0 / (n * width);
  }
  const double hist_max = *std::max_element(density.begin(), density.end());

  // Curves, sampled once a pixel column.
  const int columns = kRight - kLeft;
  const double h = xmax / columns / 2;
  std::vector<std::vector<double>> curves(kernels.size());
  double curve_max = 0;
  for (size_t i = 0; i < kernels.size(); ++i) {
    if (!kernels[i]) continue;
    curves[i].resize(static_cast<size_t>(columns) + 1);
    for (int px = 0; px <= columns; ++px) {
      const double x = xmax * px / columns;
      const double y = Density(*kernels[i], x, h);
      curves[i][static_cast<size_t>(px)] = std::isfinite(y) ? y : 0.0;
      curve_max = std::max(curve_max, curves[i][static_cast<size_t>(px)]);
    }
  }
  // A sharp peak of one fit must not flatten the histogram.
  double ymax = std::max(hist_max, std::min(curve_max, 2.5 * hist_max));
  const double ystep = NiceStep(ymax, 6);
  ymax = std::ceil(ymax * 1.05 / ystep) * ystep;

  auto X = [&](double x) { return kLeft + (kRight - kLeft) * x / xmax; };
  auto Y = [&](double y) { return kBottom - (kBottom - kTop) * y / ymax; };

  // Grid and tick labels.
  for (double y = 0; y <= ymax + ystep / 2; y += ystep) {
    const int py = static_cast<int>(std::lround(Y(y)));
    c.Line(kLeft, py, kRight, py, kGrid);
    const std::string label = Number(y, ystep);
    c.Text(kLeft - 10 - Canvas::TextWidth(label), py - Canvas::TextHeight() / 2, label, kInk);
  }
  for (double x = 0; x <= xmax + xstep / 2; x += xstep) {
    const int px = static_cast<int>(std::lround(X(x)));
    c.Line(px, kTop, px, kBottom, kGrid);
    c.Line(px, kBottom, px, kBottom + 6, kInk);
    const std::string label = Number(x, xstep);
    c.Text(px - Canvas::TextWidth(label) / 2, kBottom + 12, label, kInk);
  }

  // Bars.
  for (int b = 0; b < bins; ++b) {
    const double v = density[static_cast<size_t>(b)];
    if (v <= 0) continue;
    const int x0 = static_cast<int>(std::lround(X(b * width)));
    const int x1 = static_cast<int>(std::lround(X((b + 1) * width)));
    const int y0 = static_cast<int>(std::lround(Y(std::min(v, ymax))));
    c.Fill(x0, y0, x1, kBottom, kBarEdge);
    c.Fill(x0 + 1, y0 + 1, x1 - 1, kBottom, kBar);
  }

  // Curves: the others first, the chosen one last and thick.
  auto draw_curve = [&](size_t i, int thickness) {
    const Rgb colour = FitColour(static_cast<int>(i));
    for (int px = 0; px < columns; ++px) {
      const double y0 = std::min(curves[i][static_cast<size_t>(px)], ymax * 1.02);
      const double y1 = std::min(curves[i][static_cast<size_t>(px) + 1], ymax * 1.02);
      c.Line(kLeft + px, Y(y0), kLeft + px + 1, Y(y1), colour, thickness);
    }
  };
  for (size_t i = 0; i < curves.size(); ++i) {
    if (!curves[i].empty() && static_cast<int>(i) != chosen) draw_curve(i, 2);
  }
  if (chosen < static_cast<int>(curves.size()) && !curves[static_cast<size_t>(chosen)].empty()) {
    draw_curve(static_cast<size_t>(chosen), 5);
  }

  // Axes and their names.
  c.Line(kLeft, kTop, kLeft, kBottom, kInk, 2);
  c.Line(kLeft, kBottom, kRight, kBottom, kInk, 2);
  const std::string xname = "delay (s)";
  c.Text((kLeft + kRight - Canvas::TextWidth(xname)) / 2, kBottom + 40, xname, kInk);
  const std::string yname = "density (1/s)";
  c.TextUp(18, (kTop + kBottom + Canvas::TextWidth(yname)) / 2, yname, kInk);

  // Legend, top right: the histogram, then each fit with its dAIC.
  std::vector<std::pair<std::string, int>> entries;  // text, fit index (-1: histogram)
  entries.push_back({"valid delays (histogram)", -1});
  double best_aic = 0;
  if (chosen < cal.fits_size()) best_aic = cal.fits(chosen).aic();
  for (int i = 0; i < cal.fits_size(); ++i) {
    if (curves[static_cast<size_t>(i)].empty()) continue;
    char daic[32];
    std::snprintf(daic, sizeof daic, "%.1f", cal.fits(i).aic() - best_aic);
    entries.push_back(
        {cal.fits(i).family() + (i == chosen ? " (chosen)" : "") + "  dAIC " + daic, i});
  }
  int text_w = 0;
  for (const auto& e : entries) text_w = std::max(text_w, Canvas::TextWidth(e.first));
  const int line_h = Canvas::TextHeight() + 8;
  const int box_w = text_w + 60, box_h = static_cast<int>(entries.size()) * line_h + 10;
  const int bx = kRight - box_w - 8, by = kTop + 8;
  c.Fill(bx, by, bx + box_w, by + box_h, kWhite);
  c.Line(bx, by, bx + box_w, by, kInk);
  c.Line(bx, by + box_h, bx + box_w, by + box_h, kInk);
  c.Line(bx, by, bx, by + box_h, kInk);
  c.Line(bx + box_w, by, bx + box_w, by + box_h, kInk);
  for (size_t k = 0; k < entries.size(); ++k) {
    const int ty = by + 8 + static_cast<int>(k) * line_h;
    const int idx = entries[k].second;
    if (idx < 0) {
      c.Fill(bx + 10, ty, bx + 40, ty + Canvas::TextHeight(), kBarEdge);
      c.Fill(bx + 11, ty + 1, bx + 39, ty + Canvas::TextHeight() - 1, kBar);
    } else {
      c.Line(bx + 10, ty + Canvas::TextHeight() / 2, bx + 40, ty + Canvas::TextHeight() / 2,
             FitColour(idx), idx == chosen ? 5 : 2);
    }
    c.Text(bx + 50, ty, entries[k].first, kInk);
  }
  return c;
}

}  // namespace tickmark::cli::plot

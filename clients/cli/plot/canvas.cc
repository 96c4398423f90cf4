#include "clients/cli/plot/canvas.h"

#include <algorithm>
#include <cmath>

#include "clients/cli/plot/bitmap_font.h"
#include "clients/cli/plot/png_writer.h"

namespace tickmark::cli::plot {
namespace {

// A missing character: a hollow box the size of a glyph.
constexpr Glyph kBox = {0x1F, 0x11, 0x11, 0x11, 0x11, 0x11, 0x1F};

Glyph GlyphOf(char c) {
  Glyph g;
  return FindGlyph(c, &g) ? g : kBox;
}

}  // namespace

Canvas::Canvas(int width, int height, Rgb background)
    : width_(std::max(1, width)), height_(std::max(1, height)) {
  rgb_.resize(static_cast<size_t>(width_) * static_cast<size_t>(height_) * 3);
  for (size_t i = 0; i < rgb_.size(); i += 3) {
    rgb_[i] = background.r;
    rgb_[i + 1] = background.g;
    rgb_[i + 2] = background.b;
  }
}

void Canvas::Set(int x, int y, Rgb c) {
  if (x < 0 || y < 0 || x >= width_ || y >= height_) return;
  const size_t i =
      (static_cast<size_t>(y) * static_cast<size_t>(width_) + static_cast<size_t>(x)) * 3;
  rgb_[i] = c.r;
  rgb_[i + 1] = c.g;
  rgb_[i + 2] = c.b;
}

Rgb Canvas::Get(int x, int y) const {
  if (x < 0 || y < 0 || x >= width_ || y >= height_) return {};
  const size_t i =
      (static_cast<size_t>(y) * static_cast<size_t>(width_) + static_cast<size_t>(x)) * 3;
  return {rgb_[i], rgb_[i + 1], rgb_[i + 2]};
}

void Canvas::Fill(int x0, int y0, int x1, int y1, Rgb c) {
  if (x0 > x1) std::swap(x0, x1);
  if (y0 > y1) std::swap(y0, y1);
  x0 = std::max(x0, 0);
  y0 = std::max(y0, 0);
  x1 = std::min(x1, width_ - 1);
  y1 = std::min(y1, height_ - 1);
  for (int y = y0; y <= y1; ++y) {
    for (int x = x0; x <= x1; ++x) Set(x, y, c);
  }
}

void Canvas::Line(double x0, double y0, double x1, double y1, Rgb c, int thickness) {
  if (!std::isfinite(x0) || !std::isfinite(y0) || !std::isfinite(x1) || !std::isfinite(y1)) {
    return;
  }
  // Keep far-off points from making the loop long: clamp to a margin
  // around the canvas (a line leaving the canvas is clipped anyway).
  const double lim = 4.0 * std::max(width_, height_);
  x0 = std::clamp(x0, -lim, lim);
  x1 = std::clamp(x1, -lim, lim);
  y0 = std::clamp(y0, -lim, lim);
  y1 = std::clamp(y1, -lim, lim);
  const int steps =
      static_cast<int>(std::ceil(std::max(std::fabs(x1 - x0), std::fabs(y1 - y0)))) + 1;
  const int lo = -(thickness - 1) / 2, hi = thickness / 2;
  for (int i = 0; i <= steps; ++i) {
    const double t = static_cast<double>(i) / steps;
    const int x = static_cast<int>(std::lround(x0 + (x1 - x0) * t));
    const int y = static_cast<int>(std::lround(y0 + (y1 - y0) * t));
    for (int dy = lo; dy <= hi; ++dy) {
      for (int dx = lo; dx <= hi; ++dx) Set(x + dx, y + dy, c);
    }
  }
}

void Canvas::Text(int x, int y, const std::string& text, Rgb c, int scale) {
  for (char ch : text) {
    const Glyph g = GlyphOf(ch);
    for (int row = 0; row < kGlyphHeight; ++row) {
      for (int col = 0; col < kGlyphWidth; ++col) {
        if (g[static_cast<size_t>(row)] & (1 << (kGlyphWidth - 1 - col))) {
          Fill(x + col * scale, y + row * scale, x + (col + 1) * scale - 1,
               y + (row + 1) * scale - 1, c);
        }
      }
    }
    x += (kGlyphWidth + kGlyphGap) * scale;
  }
}

void Canvas::TextUp(int x, int y, const std::string& text, Rgb c, int scale) {
  // Glyph column `col` runs upward from y; glyph row `row` is at x + row.
  for (char ch : text) {
    const Glyph g = GlyphOf(ch);
    for (int row = 0; row < kGlyphHeight; ++row) {
      for (int col = 0; col < kGlyphWidth; ++col) {
        if (g[static_cast<size_t>(row)] & (1 << (kGlyphWidth - 1 - col))) {
          Fill(x + row * scale, y - (col + 1) * scale + 1, x + (row + 1) * scale - 1,
               y - col * scale, c);
        }
      }
    }
    y -= (kGlyphWidth + kGlyphGap) * scale;
  }
}

int Canvas::TextWidth(const std::string& text, int scale) {
  if (text.empty()) return 0;
  return static_cast<int>(text.size()) * (kGlyphWidth + kGlyphGap) * scale - kGlyphGap * scale;
}

int Canvas::TextHeight(int scale) { return kGlyphHeight * scale; }

std::string Canvas::Png() const {
  return EncodePng(static_cast<uint32_t>(width_), static_cast<uint32_t>(height_), rgb_);
}

}  // namespace tickmark::cli::plot

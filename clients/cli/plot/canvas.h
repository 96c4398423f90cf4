// A small RGB raster for the CLI's plots: pixels, thick lines, filled
// rectangles and text in a built-in 5x7 bitmap font (bitmap_font.h), scaled
// by whole pixels. Coordinates are pixels from the top-left corner; drawing
// outside the canvas is clipped.
//
// Not thread-safe: one owner draws, then Png() encodes.
#ifndef TICKMARK_CLIENTS_CLI_PLOT_CANVAS_H_
#define TICKMARK_CLIENTS_CLI_PLOT_CANVAS_H_

#include <cstdint>
#include <string>
#include <vector>

namespace tickmark::cli::plot {

struct Rgb {
  uint8_t r = 0, g = 0, b = 0;
  bool operator==(const Rgb&) const = default;
};

class Canvas {
 public:
  // A width x height canvas filled with `background`.
  Canvas(int width, int height, Rgb background);

  int width() const { return width_; }
  int height() const { return height_; }

  void Set(int x, int y, Rgb c);
  Rgb Get(int x, int y) const;
  // Filled rectangle [x0, x1] x [y0, y1] (inclusive, any order).
  void Fill(int x0, int y0, int x1, int y1, Rgb c);
  // Straight line of `thickness` pixels (a square pen) from (x0, y0) to (x1, y1).
  void Line(double x0, double y0, double x1, double y1, Rgb c, int thickness = 1);
  // Text with its top-left corner at (x, y); each font pixel is `scale`
  // pixels square. Characters the font lacks are drawn as a hollow box.
  void Text(int x, int y, const std::string& text, Rgb c, int scale = 2);
  // Text rotated a quarter turn counter-clockwise (reads bottom to top),
  // its first character's bottom-left at (x, y).
  void TextUp(int x, int y, const std::string& text, Rgb c, int scale = 2);
  // Width and height in pixels that Text() would cover.
  static int TextWidth(const std::string& text, int scale = 2);
  static int TextHeight(int scale = 2);

  // The canvas as a PNG file (png_writer.h).
  std::string Png() const;

 private:
  int width_, height_;
  std::vector<uint8_t> rgb_;  // 3 bytes a pixel, rows top to bottom
};

}  // namespace tickmark::cli::plot

#endif  // TICKMARK_CLIENTS_CLI_PLOT_CANVAS_H_

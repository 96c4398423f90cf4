// The CLI's built-in bitmap font: printable ASCII in 5x7 cells, drawn for
// tickmark (no font file is read). Each glyph is 7 rows, top to bottom; bit
// 4 of a row is its leftmost pixel.
//
// Pure data; thread-safe.
#ifndef TICKMARK_CLIENTS_CLI_PLOT_BITMAP_FONT_H_
#define TICKMARK_CLIENTS_CLI_PLOT_BITMAP_FONT_H_

#include <array>
#include <cstdint>

namespace tickmark::cli::plot {

inline constexpr int kGlyphWidth = 5;
inline constexpr int kGlyphHeight = 7;
// Pixels between characters, and between lines, at scale 1.
inline constexpr int kGlyphGap = 1;

using Glyph = std::array<uint8_t, kGlyphHeight>;

// The glyph of `c`; false (and *glyph untouched) when the font lacks it.
bool FindGlyph(char c, Glyph* glyph);

}  // namespace tickmark::cli::plot

#endif  // TICKMARK_CLIENTS_CLI_PLOT_BITMAP_FONT_H_

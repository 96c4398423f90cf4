// A minimal PNG encoder for the CLI's plots: 8-bit RGB, no interlace, every
// scanline with filter type 0 (None), the image data deflated by zlib.
// Chunk layout and CRC as in the PNG specification (ISO/IEC 15948, W3C PNG
// 2nd edition §5.3: length, type, data, CRC-32 of type and data).
//
// Pure functions; thread-safe.
#ifndef TICKMARK_CLIENTS_CLI_PLOT_PNG_WRITER_H_
#define TICKMARK_CLIENTS_CLI_PLOT_PNG_WRITER_H_

#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

namespace tickmark::cli::plot {

// CRC-32 (ISO 3309 / ITU-T V.42, the one PNG uses) of `bytes`.
uint32_t PngCrc(std::string_view bytes);

// The PNG file for a width x height image; `rgb` holds 3 bytes a pixel, rows
// top to bottom. Empty when the sizes do not match or zlib fails.
std::string EncodePng(uint32_t width, uint32_t height, const std::vector<uint8_t>& rgb);

}  // namespace tickmark::cli::plot

#endif  // TICKMARK_CLIENTS_CLI_PLOT_PNG_WRITER_H_

#include "clients/cli/plot/png_writer.h"

#include <zlib.h>

#include <algorithm>

namespace tickmark::cli::plot {
namespace {

void PutU32(std::string* out, uint32_t v) {
  out->push_back(static_cast<char>((v >> 24) & 0xff));
  out->push_back(static_cast<char>((v >> 16) & 0xff));
  out->push_back(static_cast<char>((v >> 8) & 0xff));
  out->push_back(static_cast<char>(v & 0xff));
}

void PutChunk(std::string* out, std::string_view type, std::string_view data) {
  PutU32(out, static_cast<uint32_t>(data.size()));
  std::string typed(type);
  typed.append(data);
  out->append(typed);
  PutU32(out, PngCrc(typed));
}

}  // namespace

uint32_t PngCrc(std::string_view bytes) {
  uLong crc = crc32(0L, Z_NULL, 0);
  // zlib takes uInt lengths; feed large inputs in pieces.
  while (!bytes.empty()) {
    const size_t n = std::min<size_t>(bytes.size(), 1u << 30);
    crc = crc32(crc, reinterpret_cast<const Bytef*>(bytes.data()), static_cast<uInt>(n));
    bytes.remove_prefix(n);
  }
  return static_cast<uint32_t>(crc);
}

std::string EncodePng(uint32_t width, uint32_t height, const std::vector<uint8_t>& rgb) {
  const size_t row = static_cast<size_t>(width) * 3;
  if (width == 0 || height == 0 || rgb.size() != row * height) return "";
  std::string raw;
  raw.reserve((row + 1) * height);
  for (uint32_t y = 0; y < height; ++y) {
    raw.push_back('\0');  // filter type 0: the row as it is
    raw.append(reinterpret_cast<const char*>(rgb.data()) + y * row, row);
  }
  uLongf packed_size = compressBound(static_cast<uLong>(raw.size()));
  std::string packed(packed_size, '\0');
  if (compress2(reinterpret_cast<Bytef*>(packed.data()), &packed_size,
                reinterpret_cast<const Bytef*>(raw.data()), static_cast<uLong>(raw.size()),
                Z_BEST_COMPRESSION) != Z_OK) {
    return "";
  }
  packed.resize(packed_size);

  std::string out("\x89PNG\r\n\x1a\n", 8);
  std::string header;
  PutU32(&header, width);
  PutU32(&header, height);
  header.push_back(8);  // bit depth
  header.push_back(2);  // colour type: truecolour (RGB)
  header.push_back(0);  // compression: deflate
  header.push_back(0);  // filter method 0
  header.push_back(0);  // no interlace
  PutChunk(&out, "IHDR", header);
  PutChunk(&out, "IDAT", packed);
  PutChunk(&out, "IEND", "");
  return out;
}

}  // namespace tickmark::cli::plot

#include "clients/cli/qr_text.h"

#include <qrencode.h>

#include <memory>

namespace tickmark::cli {
namespace {

constexpr int kQuietZone = 4;  // ISO/IEC 18004: a quiet zone of 4 modules

}  // namespace

absl::StatusOr<std::vector<std::vector<bool>>> QrModules(const std::string& text) {
  // Version 0: the smallest that fits; 8-bit mode, case kept.
  std::unique_ptr<QRcode, decltype(&QRcode_free)> code(
      QRcode_encodeString(text.c_str(), 0, QR_ECLEVEL_M, QR_MODE_8, 1), &QRcode_free);
  if (!code) return absl::InvalidArgumentError("the link does not fit in a QR code");
  const int n = code->width;
  const int size = n + 2 * kQuietZone;
  std::vector<std::vector<bool>> m(size, std::vector<bool>(size, false));
  for (int y = 0; y < n; ++y) {
    for (int x = 0; x < n; ++x) {
      // libqrencode: bit 0 of each byte is the module's colour (1: dark).
      m[y + kQuietZone][x + kQuietZone] = (code->data[y * n + x] & 1) != 0;
    }
  }
  return m;
}

absl::StatusOr<std::string> QrText(const std::string& text, QrStyle style) {
  auto modules = QrModules(text);
  if (!modules.ok()) return modules.status();
  const auto& m = *modules;
  const size_t size = m.size();
  std::string out;
  for (size_t y = 0; y < size; y += 2) {
    if (style == QrStyle::kAnsi) out += "\x1b[30;107m";  // black on bright white
    for (size_t x = 0; x < size; ++x) {
      const bool top = m[y][x];
      const bool bottom = y + 1 < size && m[y + 1][x];
      out += top && bottom ? "\u2588" : top ? "\u2580" : bottom ? "\u2584" : " ";
    }
    if (style == QrStyle::kAnsi) out += "\x1b[0m";
    out += "\n";
  }
  return out;
}

}  // namespace tickmark::cli

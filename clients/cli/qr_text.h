// A QR code (ISO/IEC 18004) for a terminal: `tickmark invite` prints its join
// link this way so a phone can open it. libqrencode (Debian's
// libqrencode-dev) makes the symbol; this file only draws it, two rows of
// modules per text line with Unicode half blocks, inside the standard quiet
// zone of 4 modules.
//
// Styles:
//   kAnsi   dark modules in black on a bright white background (ANSI colour
//           escapes), which reads right on dark and light terminals alike;
//   kPlain  no escapes: dark modules are the glyphs' ink, for light
//           backgrounds, files and paper.
//
// Pure functions; thread-safe.
#ifndef TICKMARK_CLIENTS_CLI_QR_TEXT_H_
#define TICKMARK_CLIENTS_CLI_QR_TEXT_H_

#include <string>
#include <vector>

#include "absl/status/statusor.h"

namespace tickmark::cli {

enum class QrStyle { kAnsi, kPlain };

// The symbol's modules (true: dark), with the quiet zone, error correction
// level M. INVALID_ARGUMENT if the text does not fit a QR code.
absl::StatusOr<std::vector<std::vector<bool>>> QrModules(const std::string& text);

// The symbol as text lines, each ending in '\n'.
absl::StatusOr<std::string> QrText(const std::string& text, QrStyle style);

}  // namespace tickmark::cli

#endif  // TICKMARK_CLIENTS_CLI_QR_TEXT_H_

// The web page's files (server/web/assets/), built into the binary so the
// page works with no network beyond the server (labs are often offline): no
// CDN, no external fonts. CMake turns every file of the folder into bytes in
// a generated assets.cc (server/web/embed_assets.cmake), with its content
// type and an ETag (the first 16 hex digits of its SHA-256).
#ifndef TICKMARK_SERVER_WEB_ASSETS_H_
#define TICKMARK_SERVER_WEB_ASSETS_H_

#include <cstddef>
#include <string_view>

namespace tickmark::web {

struct Asset {
  std::string_view name;          // file name in server/web/assets/ ("trainer.html")
  std::string_view content_type;  // "text/html; charset=utf-8"
  std::string_view etag;          // quoted, as sent in the ETag header
  std::string_view body;
};

// The asset with this file name, or null.
const Asset* FindAsset(std::string_view name);
// Every asset, for tests.
const Asset* AllAssets(size_t* count);

}  // namespace tickmark::web

#endif  // TICKMARK_SERVER_WEB_ASSETS_H_

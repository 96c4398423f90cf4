#include "clients/common/token.h"

#include <sys/stat.h>

#include <cerrno>
#include <cstdlib>
#include <cstring>
#include <fstream>
#include <sstream>

#include "absl/strings/ascii.h"
#include "absl/strings/str_cat.h"

namespace tickmark::client {
namespace {

absl::Status CheckShape(const std::string& token, const std::string& origin) {
  if (token.empty()) {
    return absl::InvalidArgumentError(absl::StrCat("token from ", origin, " is empty"));
  }
  if (token.find_first_of("\r\n") != std::string::npos) {
    return absl::InvalidArgumentError(
        absl::StrCat("token from ", origin, " spans several lines"));
  }
  return absl::OkStatus();
}

}  // namespace

absl::StatusOr<Token> ReadToken(const TokenFlags& flags) {
  Token out;
  if (!flags.token_file.empty()) {
    out.origin = absl::StrCat("file ", flags.token_file);
    std::ifstream in(flags.token_file, std::ios::binary);
    if (!in) {
      int err = errno;
      return absl::ErrnoToStatus(
          err, absl::StrCat("cannot read token file ", flags.token_file));
    }
    std::stringstream ss;
    ss << in.rdbuf();
    out.value = std::string(absl::StripTrailingAsciiWhitespace(ss.str()));
    struct stat st{};
    if (stat(flags.token_file.c_str(), &st) == 0 &&
        (st.st_mode & (S_IRWXG | S_IRWXO)) != 0) {
      out.warnings.push_back(absl::StrCat(
          "token file ", flags.token_file,
          " is readable by other users; chmod 600 it"));
    }
    if (!flags.token.empty()) {
      out.warnings.push_back("both --token-file and --token given; using the file");
    }
  } else if (!flags.token.empty()) {
    out.origin = "--token";
    out.value = flags.token;
    out.warnings.push_back(
        "--token puts the secret where every local user can read it (ps, "
        "/proc); prefer --token-file or TICKMARK_TOKEN");
  } else if (const char* env = std::getenv(kTokenEnvVar); env != nullptr) {
    out.origin = kTokenEnvVar;
    out.value = std::string(absl::StripTrailingAsciiWhitespace(env));
  } else {
    return absl::NotFoundError(absl::StrCat(
        "no token: give --token-file PATH or set ", kTokenEnvVar));
  }
  if (absl::Status s = CheckShape(out.value, out.origin); !s.ok()) return s;
  return out;
}

}  // namespace tickmark::client

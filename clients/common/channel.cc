#include "clients/common/channel.h"

#include <cerrno>
#include <fstream>
#include <sstream>

#include "absl/strings/str_cat.h"
#include "server/net/address.h"

namespace tickmark::client {
namespace {

// Debian's absl is built as C++14, so absl::string_view is not
// std::string_view; this helper avoids converting back and forth.
bool StartsWith(std::string_view s, std::string_view prefix) {
  return s.substr(0, prefix.size()) == prefix;
}

}  // namespace

std::string TargetHost(std::string_view target) {
  if (StartsWith(target, "unix:") || StartsWith(target, "unix-abstract:")) {
    return "unix";
  }
  // Scheme forms: "dns:///host:port", "dns://authority/host:port", "ipv4:...".
  if (size_t p = target.find(":///"); p != std::string_view::npos) {
    target.remove_prefix(p + 4);
  } else if (size_t q = target.find("://"); q != std::string_view::npos) {
    target.remove_prefix(q + 3);
    size_t slash = target.find('/');
    if (slash != std::string_view::npos) target.remove_prefix(slash + 1);
  } else if (StartsWith(target, "ipv4:") || StartsWith(target, "ipv6:")) {
    target.remove_prefix(5);
  }
  return net::HostOf(target);
}

bool MayUsePlaintext(std::string_view target) {
  const std::string host = TargetHost(target);
  // A unix socket never leaves the machine; every other host follows the
  // one loopback rule (server/net/address.h).
  return host == "unix" || net::IsLoopbackHost(host);
}

absl::StatusOr<ChannelChoice> ChooseCredentials(const ChannelFlags& flags) {
  if (flags.insecure && !flags.ca_file.empty()) {
    return absl::InvalidArgumentError("--insecure and --ca-file contradict each other");
  }
  ChannelChoice out;
  if (!flags.ca_file.empty()) {
    std::ifstream in(flags.ca_file, std::ios::binary);
    if (!in) {
      int err = errno;
      return absl::ErrnoToStatus(err, absl::StrCat("cannot read CA file ", flags.ca_file));
    }
    std::stringstream ss;
    ss << in.rdbuf();
    grpc::SslCredentialsOptions opts;
    opts.pem_root_certs = ss.str();
    out.credentials = grpc::SslCredentials(opts);
    out.tls = true;
  } else if (flags.insecure || MayUsePlaintext(flags.target)) {
    out.credentials = grpc::InsecureChannelCredentials();
  } else {
    out.credentials = grpc::SslCredentials(grpc::SslCredentialsOptions());
    out.tls = true;
  }
  return out;
}

}  // namespace tickmark::client

#include "clients/common/connection_flags.h"

#include <cmath>
#include <cstdlib>

#include "clients/common/client_id.h"

namespace tickmark::client {
namespace {

CLI::Validator NonEmpty() {
  return CLI::Validator(
      [](std::string& v) { return v.empty() ? std::string("needs a non-empty value") : ""; }, "");
}

CLI::Validator ClientIdText() {
  return CLI::Validator(
      [](std::string& v) {
        absl::Status s = ValidateClientId(v);
        return s.ok() ? std::string() : std::string(s.message());
      },
      "");
}

// Validators see the text before it is converted; text that is no number
// is left to the conversion, whose error names the flag too.
CLI::Validator FiniteSeconds() {
  return CLI::Validator(
      [](std::string& v) {
        const double s = std::strtod(v.c_str(), nullptr);
        return std::isfinite(s) && s >= 0 ? std::string() : "needs seconds >= 0, got " + v;
      },
      "");
}

}  // namespace

CLI::Option* AddFlushTimeoutFlag(CLI::App& app, double* seconds) {
  return app
      .add_option("--flush-timeout", *seconds, "seconds to wait for acknowledgements at exit")
      ->type_name("S")
      ->check(FiniteSeconds());
}

void AddConnectionFlags(CLI::App& app, ConnectionFlags* flags, ConnectionFlagChoice choice) {
  if (flags->channel.target.empty()) {
    const char* env = std::getenv(kServerEnvVar);
    flags->channel.target = env != nullptr && *env != '\0' ? env : kDefaultServer;
  }
  const std::string group = "Connection";
  app.add_option("--server", flags->channel.target,
                 "tickmarkd's HOST:PORT; $TICKMARK_SERVER sets the default")
      ->type_name("ADDR")
      ->check(NonEmpty())
      ->group(group);
  app.add_option("--token-file", flags->token.token_file,
                 "file holding your token (recommended); else $TICKMARK_TOKEN")
      ->type_name("PATH")
      ->check(NonEmpty())
      ->group(group);
  app.add_option("--token", flags->token.token,
                 "the token itself: accepted with a warning, argv is visible in ps")
      ->type_name("TOKEN")
      ->check(NonEmpty())
      ->group(group);
  if (choice.client_id) {
    app.add_option("--client-id", flags->client_id,
                   "stable id of this client (letters, digits - _ . :, at most 64); two "
                   "instances running at once must not share one")
        ->type_name("ID")
        ->check(ClientIdText())
        ->group(group);
    app.add_flag("--no-realtime", flags->no_realtime,
                 "send no real-time clock readings with events, even when this host's clock is "
                 "synchronised (NTP/PTP); the server then maps them by round trip alone")
        ->group(group);
  }
  CLI::Option* ca = app.add_option("--ca-file", flags->channel.ca_file,
                                   "use TLS, trusting the PEM CA certificates in PATH")
                        ->type_name("PATH")
                        ->check(NonEmpty())
                        ->group(group);
  app.add_flag("--insecure", flags->channel.insecure,
               "allow plaintext to a non-loopback host (loopback is plaintext anyway; other "
               "hosts get TLS with the system's roots)")
      ->excludes(ca)
      ->group(group);
}

}  // namespace tickmark::client

// tickmark marker add.
#include <iostream>
#include <memory>

#include "clients/cli/commands.h"
#include "clients/cli/output.h"

namespace tickmark::cli {

namespace v1 = tickmark::v1;

void AddMarkerCommands(CommandTable& table) {
  CLI::App* group = table.AddGroup("marker", "put markers on a session's timeline");
  auto req = std::make_shared<v1::AddMarkerRequest>();
  CLI::App* cmd = table.AddCommand(
      group, "add", "Puts a marker on the session timeline now.", [&table, req] {
        return CallAdmin<v1::AddMarkerRequest, v1::AddMarkerResponse>(
            table.common(), &v1::SessionAdmin::Stub::AddMarker, *req,
            [](const v1::AddMarkerResponse& r) {
              std::cout << "marker #" << r.sequence() << " at "
                        << FormatUtc(r.marker().at_session_ns()) << "\n";
              return kExitOk;
            });
      });
  cmd->add_option_function<std::string>(
         "--session", [req](const std::string& v) { req->set_session_id(v); }, "session id")
      ->required();
  cmd->add_option_function<std::string>(
         "TEXT", [req](const std::string& v) { req->set_text(v); }, "the marker's text")
      ->required();
}

}  // namespace tickmark::cli

// tickmark invite: a join link for the web page (docs/web.md), printed with
// a QR code for phones.
#include <unistd.h>

#include <iostream>
#include <memory>

#include "clients/cli/commands.h"
#include "clients/cli/output.h"
#include "clients/cli/qr_text.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;

// "90s", "15m", "2h", "1d" (or a bare number of seconds) -> ns; nullopt if
// it is none of these or not above 0.
std::optional<int64_t> ParseLifetime(const std::string& text) {
  if (text.empty()) return std::nullopt;
  size_t used = 0;
  double v = 0;
  try {
    v = std::stod(text, &used);
  } catch (const std::exception&) {
    return std::nullopt;
  }
  const std::string unit = text.substr(used);
  double scale = 0;
  if (unit.empty() || unit == "s")
    scale = 1;
  else if (unit == "m" || unit == "min")
    scale = 60;
  else if (unit == "h")
    scale = 3600;
  else if (unit == "d")
    scale = 86400;
  else
    return std::nullopt;
  const double ns = v * scale * 1e9;
  if (!(ns >= 1e9) || ns > 366.0 * 86400 * 1e9) return std::nullopt;
  return static_cast<int64_t>(ns);
}

}  // namespace

void AddInviteCommand(CommandTable& table) {
  auto req = std::make_shared<v1::CreateInviteRequest>();
  auto qr = std::make_shared<std::string>("auto");
  CLI::App* cmd = table.AddCommand(
      table.root(), "invite",
      "Makes a join link for the web page: a trainer's page (--role trainer) or the live "
      "view (--role observer). The link works once and expires; it is printed with a QR code "
      "for phones. Needs the server's web port (tickmarkd --http-listen).",
      [&table, req, qr] {
        return CallAdmin<v1::CreateInviteRequest, v1::CreateInviteResponse>(
            table.common(), &v1::SessionAdmin::Stub::CreateInvite, *req,
            [qr](const v1::CreateInviteResponse& r) {
              const std::string who =
                  RoleWord(r.role()) + (r.subject().empty() ? "" : " " + r.subject());
              std::cerr << "Invite for " << who << " in session " << r.session_id()
                        << "; works once, until " << FormatUtc(r.expires_session_ns())
                        << ". Send it to that person only.\n";
              std::cout << r.url() << "\n";
              const bool tty = isatty(STDOUT_FILENO) == 1;
              if (*qr == "none" || (*qr == "auto" && !tty)) return kExitOk;
              auto text = QrText(r.url(), *qr == "plain" ? QrStyle::kPlain : QrStyle::kAnsi);
              if (!text.ok()) {
                std::cerr << "tickmark: no QR code: " << text.status().message() << "\n";
                return kExitOk;
              }
              std::cout << *text << "code " << r.code() << "\n";
              return kExitOk;
            });
      });
  cmd->add_option_function<std::string>(
         "--session", [req](const std::string& v) { req->set_session_id(v); }, "session id")
      ->required();
  cmd->add_option_function<std::string>(
         "--role",
         [req](const std::string& v) {
           req->set_role(v == "trainer" ? v1::ROLE_TRAINER : v1::ROLE_OBSERVER);
         },
         "trainer (the trainer page) or observer (the live view)")
      ->required()
      ->type_name("ROLE")
      ->check(CLI::IsMember({"trainer", "observer"}));
  cmd->add_option_function<std::string>(
      "--subject", [req](const std::string& v) { req->set_subject(v); },
      "the trainer's pseudonym (not a real name); required for trainers");
  cmd->add_option_function<std::string>(
         "--expires", [req](const std::string& v) { req->set_expires_in_ns(*ParseLifetime(v)); },
         "how long the link works: 90s, 15m, 2h, 1d (default 15m)")
      ->type_name("TIME")
      ->check(CLI::Validator(
          [](std::string& v) {
            return ParseLifetime(v) ? std::string()
                                    : "'" + v + "' is not a time such as 90s, 15m, 2h or 1d";
          },
          ""));
  cmd->add_option_function<std::vector<double>>(
         "--graded-values",
         [req](const std::vector<double>& v) {
           for (double x : v) req->add_graded_values(x);
         },
         "extra buttons with these values on the trainer page, in order (e.g. -1,-0.5,0.5,1)")
      ->delimiter(',')
      ->type_name("V,V,...");
  cmd->add_option("--qr", *qr,
                  "QR code: auto (on a terminal), ansi (black on white, any terminal), plain "
                  "(no colour codes; for light backgrounds and paper) or none")
      ->type_name("MODE")
      ->check(CLI::IsMember({"auto", "ansi", "plain", "none"}));
}

}  // namespace tickmark::cli

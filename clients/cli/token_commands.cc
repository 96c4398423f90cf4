// tickmark token issue|list|revoke.
#include <iomanip>
#include <iostream>
#include <memory>

#include "clients/cli/commands.h"
#include "clients/cli/output.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;
using Admin = v1::SessionAdmin::Stub;

// Accepts a role word (trainer, agent, observer, admin).
CLI::Validator RoleText() {
  return CLI::Validator(
      [](std::string& word) {
        return ParseRoleWord(word) ? std::string()
                                   : "'" + word + "' is not trainer, agent, observer or admin";
      },
      "");
}

CLI::Option* AddSessionFlag(CLI::App* cmd, std::function<void(const std::string&)> set) {
  return cmd->add_option_function<std::string>("--session", std::move(set), "session id")
      ->required();
}

void AddIssue(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::IssueTokenRequest>();
  auto out = std::make_shared<std::string>();
  CLI::App* cmd = table.AddCommand(
      group, "issue",
      "Issues a token for a trainer, agent, observer or admin. Trainer tokens name a "
      "pseudonym, agent tokens an agent name.",
      [&table, req, out] {
        return CallAdmin<v1::IssueTokenRequest, v1::IssueTokenResponse>(
            table.common(), &Admin::IssueToken, *req, [&](const v1::IssueTokenResponse& r) {
              const std::string who =
                  RoleWord(req->role()) + (req->subject().empty() ? "" : " " + req->subject());
              if (!out->empty()) {
                if (!WriteSecretFile(*out, r.secret())) return kExitError;
                std::cerr << "token " << r.token().token_id() << " (" << who << ") written to "
                          << *out << "\n";
              } else {
                std::cerr << "token " << r.token().token_id() << " (" << who
                          << "); the secret follows, shown once:\n";
                std::cout << r.secret() << "\n";
              }
              return kExitOk;
            });
      });
  AddSessionFlag(cmd, [req](const std::string& v) { req->set_session_id(v); });
  cmd->add_option_function<std::string>(
         "--role", [req](const std::string& v) { req->set_role(*ParseRoleWord(v)); },
         "trainer, agent, observer or admin")
      ->required()
      ->type_name("ROLE")
      ->check(RoleText());
  cmd->add_option_function<std::string>(
      "--subject", [req](const std::string& v) { req->set_subject(v); },
      "trainer pseudonym or agent name (not a real name)");
  cmd->add_option("--out", *out, "write the secret to this file (0600) instead of stdout")
      ->type_name("FILE");
}

void AddTokenList(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::ListTokensRequest>();
  CLI::App* cmd = table.AddCommand(
      group, "list", "Lists a session's tokens (never their secrets).", [&table, req] {
        return CallAdmin<v1::ListTokensRequest, v1::ListTokensResponse>(
            table.common(), &Admin::ListTokens, *req, [](const v1::ListTokensResponse& r) {
              std::cout << std::left << std::setw(13) << "TOKEN" << std::setw(10) << "ROLE"
                        << std::setw(20) << "SUBJECT" << std::setw(9) << "STATE" << "ISSUED\n";
              for (const auto& t : r.tokens()) {
                std::cout << std::left << std::setw(13) << t.token_id() << std::setw(10)
                          << RoleWord(t.role()) << std::setw(20)
                          << (t.subject().empty() ? "-" : t.subject()) << std::setw(9)
                          << (t.revoked() ? "revoked" : "active")
                          << FormatUtc(t.issued_session_ns()) << "\n";
              }
              return kExitOk;
            });
      });
  AddSessionFlag(cmd, [req](const std::string& v) { req->set_session_id(v); });
}

void AddRevoke(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::RevokeTokenRequest>();
  CLI::App* cmd = table.AddCommand(
      group, "revoke", "Revokes a token; streams using it end.", [&table, req] {
        return CallAdmin<v1::RevokeTokenRequest, v1::RevokeTokenResponse>(
            table.common(), &Admin::RevokeToken, *req, [](const v1::RevokeTokenResponse& r) {
              std::cout << "token " << r.token().token_id() << " revoked\n";
              return kExitOk;
            });
      });
  AddSessionFlag(cmd, [req](const std::string& v) { req->set_session_id(v); });
  cmd->add_option_function<std::string>(
         "TOKEN_ID", [req](const std::string& v) { req->set_token_id(v); },
         "the token's id (from token list)")
      ->required();
}

}  // namespace

void AddTokenCommands(CommandTable& table) {
  CLI::App* group = table.AddGroup("token", "issue, list and revoke a session's tokens");
  AddIssue(table, group);
  AddTokenList(table, group);
  AddRevoke(table, group);
}

}  // namespace tickmark::cli

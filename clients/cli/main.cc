// tickmark: the operator's command line. Talks to tickmarkd over gRPC
// (SessionAdmin, Live.Subscribe). main() builds the command table from the
// command files (commands.h), parses, and runs the chosen command.
#include <iostream>

#include "clients/cli/command_table.h"
#include "clients/cli/commands.h"
#include "server/base/flags.h"

namespace {

constexpr char kDescription[] = "The operator's tool for a tickmark server.";

constexpr char kFooter[] =
    "Commands take their own flags after the command words ('tickmark session create\n"
    "--help'); the connection flags may stand before or after them. The token is read from\n"
    "--token-file, else $TICKMARK_TOKEN, else ./var/operator.token.\n"
    "\n"
    "Safety: tickmark is not a safety system. A robot trained or driven with it needs an\n"
    "independent emergency stop; studies with people need approval from your ethics board\n"
    "and participant data protection under local rules.";

}  // namespace

int main(int argc, char** argv) {
  using namespace tickmark::cli;
  CLI::App app(kDescription, "tickmark");
  tickmark::ConfigureApp(app, kFooter);
  app.require_subcommand(0, 1);
  CommonFlags common;
  AddCommonFlags(app, &common);
  CommandTable table(&app, &common);
  AddSessionCommands(table);
  AddTokenCommands(table);
  AddMarkerCommands(table);
  AddKernelCommands(table);
  AddReplayCommand(table);
  AddExportCommand(table);
  AddCalibrateCommands(table);
  AddRetimeCommand(table);
  AddInviteCommand(table);
  AddAlignCommand(table);
  AddStudyCommands(table);
  AddReportCommand(table);
  AddAuditCommands(table);

  if (argc < 2) {
    std::cerr << app.help();
    return kExitUsage;
  }
  std::string text;
  const tickmark::ParseResult parsed =
      tickmark::ParseArgs(app, std::vector<std::string>(argv + 1, argv + argc), &text);
  if (parsed == tickmark::ParseResult::kHelp) {
    std::cout << text;
    return kExitOk;
  }
  std::string words;
  const CLI::App* chosen = table.Chosen(&words);
  const Action* action = table.ActionOf(chosen);
  const std::string where = words.empty() ? "tickmark" : "tickmark " + words;
  if (action == nullptr) {
    // At the root or a group word: a word that is no command is left over.
    const std::vector<std::string> left = chosen->remaining();
    if (!left.empty() && !left.front().empty() && left.front()[0] != '-') {
      std::cerr << "tickmark: unknown command '" << (words.empty() ? "" : words + " ")
                << left.front() << "' (see " << where << " --help)\n";
    } else if (parsed == tickmark::ParseResult::kRun) {
      std::cerr << where << ": which command? (see " << where << " --help)\n";
    } else {
      std::cerr << where << ": " << text << " (see " << where << " --help)\n";
    }
    return kExitUsage;
  }
  if (parsed == tickmark::ParseResult::kError) {
    std::cerr << where << ": " << text << " (see " << where << " --help)\n";
    return kExitUsage;
  }
  return (*action)();
}

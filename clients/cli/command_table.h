// The commands of the tickmark CLI as CLI11 subcommands: groups of verbs
// (`tickmark session create`) and single-word commands (`tickmark export`).
// Each command gets the common flags (connection.h) and an action, run once
// the command line is parsed. The command files (session_commands.cc, ...)
// add their commands through Add*Commands in commands.h.
//
// Thread-compatible; used from main()'s thread.
#ifndef TICKMARK_CLIENTS_CLI_COMMAND_TABLE_H_
#define TICKMARK_CLIENTS_CLI_COMMAND_TABLE_H_

#include <functional>
#include <map>
#include <string>

#include <CLI/CLI.hpp>

#include "clients/cli/connection.h"

namespace tickmark::cli {

// A command's work once its flags are parsed; returns the exit code.
using Action = std::function<int()>;

class CommandTable {
 public:
  // `root` and `common` must outlive the table.
  CommandTable(CLI::App* root, CommonFlags* common);

  // A group word (session, token, ...) whose verbs are commands; the group
  // already added under that name, if any (command files may share a group).
  CLI::App* AddGroup(const std::string& name, const std::string& description);
  // A command under `parent` (a group, or root() for a one-word command)
  // with the common flags; `action` runs when the command line chose it.
  CLI::App* AddCommand(CLI::App* parent, const std::string& name,
                       const std::string& description, Action action);

  CLI::App* root() const { return root_; }
  const CommonFlags& common() const { return *common_; }

  // The deepest command word the parsed command line chose (root() if
  // none), and its words ("session create") in *words.
  const CLI::App* Chosen(std::string* words) const;
  // The action of `command`; null for the root and group words.
  const Action* ActionOf(const CLI::App* command) const;

 private:
  CLI::App* root_;
  CommonFlags* common_;
  std::map<const CLI::App*, Action> actions_;
  std::map<std::string, CLI::App*> groups_;  // by name
};

}  // namespace tickmark::cli

#endif  // TICKMARK_CLIENTS_CLI_COMMAND_TABLE_H_

#include "clients/cli/command_table.h"

namespace tickmark::cli {

CommandTable::CommandTable(CLI::App* root, CommonFlags* common) : root_(root), common_(common) {}

CLI::App* CommandTable::AddGroup(const std::string& name, const std::string& description) {
  // Two command files may add verbs to one group (study: audit's
  // erase-participant beside the study commands): the first makes it.
  if (auto it = groups_.find(name); it != groups_.end()) return it->second;
  CLI::App* group = root_->add_subcommand(name, description);
  groups_[name] = group;
  group->require_subcommand(0, 1);
  AddCommonFlags(*group, common_);
  return group;
}

CLI::App* CommandTable::AddCommand(CLI::App* parent, const std::string& name,
                                   const std::string& description, Action action) {
  CLI::App* command = parent->add_subcommand(name, description);
  AddCommonFlags(*command, common_);
  actions_[command] = std::move(action);
  return command;
}

const CLI::App* CommandTable::Chosen(std::string* words) const {
  const CLI::App* app = root_;
  words->clear();
  while (true) {
    auto chosen = app->get_subcommands();
    if (chosen.empty()) break;
    app = chosen.front();
    *words += (words->empty() ? "" : " ") + app->get_name();
  }
  return app;
}

const Action* CommandTable::ActionOf(const CLI::App* command) const {
  auto it = actions_.find(command);
  return it == actions_.end() ? nullptr : &it->second;
}

}  // namespace tickmark::cli

// The CLI's command groups, one file each. To add a command: write it in its
// group's file (or a new <group>_commands.cc listed in CMakeLists.txt and
// declared here), register it with table.AddCommand, and give it its flags
// on the CLI::App that returns; CallAdmin (connection.h) is the skeleton of a
// one-call command. Each Add* registers into the table; call them from
// main()'s thread, before parsing.
#ifndef TICKMARK_CLIENTS_CLI_COMMANDS_H_
#define TICKMARK_CLIENTS_CLI_COMMANDS_H_

#include "clients/cli/command_table.h"

namespace tickmark::cli {

void AddSessionCommands(CommandTable& table);  // session create|list|show|close
void AddTokenCommands(CommandTable& table);    // token issue|list|revoke
void AddMarkerCommands(CommandTable& table);   // marker add
void AddKernelCommands(CommandTable& table);   // kernel set|load
void AddReplayCommand(CommandTable& table);    // replay
void AddExportCommand(CommandTable& table);    // export
void AddCalibrateCommands(CommandTable& table);  // calibrate new|list|show|plot|apply
void AddRetimeCommand(CommandTable& table);      // retime
void AddInviteCommand(CommandTable& table);      // invite (web page join links)
void AddAlignCommand(CommandTable& table);       // align (sync pulses, docs/sync.md)
void AddStudyCommands(CommandTable& table);      // study create|list|show|condition|enroll|schedule
void AddReportCommand(CommandTable& table);      // report (HTML, through tickmark.report)
// audit verify|receipt, archive, study erase-participant (audit_commands.cc)
void AddAuditCommands(CommandTable& table);
// Prints a closed session's receipt from the server (session close uses it).
int PrintReceiptOf(const CommonFlags& common, const std::string& session_id);

}  // namespace tickmark::cli

#endif  // TICKMARK_CLIENTS_CLI_COMMANDS_H_

// Command-line conventions shared by every tickmark program, on CLI11.
//
// Each program builds a CLI::App, hands it to ConfigureApp first (so every
// program has the same help layout, --help/-h, `--flag value` and
// `--flag=value`, boolean flags that also take `=true`/`=false`, defaults
// shown in the help), adds its flags, and calls ParseCommandLine:
//
//   CLI::App app("Runs the tickmark server.", "tickmarkd");
//   tickmark::ConfigureApp(app, kSafety);
//   app.add_option("--listen", options.listen, "HOST:PORT for gRPC");
//   if (auto exit = tickmark::ParseCommandLine(app, argc, argv)) return *exit;
//
// Errors are one line on stderr, "PROGRAM: MESSAGE (see PROGRAM --help)",
// and name the flag (or, for a config file, the file and key); the exit code
// is kExitUsage.
//
// AddTomlConfig adds `--config FILE`: a TOML file whose top-level keys are
// the long flag names (without the dashes in front), with values of the
// flag's type. An unknown key, a section, or a bad value is an error naming
// the key; flags given on the command line win over the file. It also adds
// --print-config, which prints the settings in force as such a file.
//
// Not thread-safe; use from main().
#ifndef TICKMARK_SERVER_BASE_FLAGS_H_
#define TICKMARK_SERVER_BASE_FLAGS_H_

#include <optional>
#include <string>
#include <vector>

#include <CLI/CLI.hpp>

namespace tickmark {

// Exit code for usage and configuration errors, the same in every program.
inline constexpr int kExitUsage = 2;

// Sets `app` (and subcommands added after this call) up the tickmark way.
// `footer` is printed after the flags in --help (notices, examples). On a
// top-level app it also adds --version (AddVersionFlag), so every program
// built on ConfigureApp answers it.
void ConfigureApp(CLI::App& app, const std::string& footer = "");

// Adds `--version`, which prints VersionLine(app's name) and exits 0.
// ConfigureApp calls it; a program that does not use ConfigureApp calls it
// itself. The version comes from the generated tickmark/version.h.
CLI::Option* AddVersionFlag(CLI::App& app);

// "PROGRAM 0.1.0 (wire contract tickmark.v1 1.0)".
std::string VersionLine(const std::string& program);

enum class ParseResult {
  kRun,    // flags parsed; the program goes on
  kHelp,   // --help (or --print-config) given; `text` holds what to print
  kError,  // bad command line or config; `text` holds the message
};

// Parses `args` (without the program name) into `app`. No output.
ParseResult ParseArgs(CLI::App& app, const std::vector<std::string>& args, std::string* text);

// ParseArgs on argv, printing help to stdout or the error to stderr.
// Returns the exit code to stop with (0 after --help, kExitUsage after an
// error), or nullopt when the program should run.
std::optional<int> ParseCommandLine(CLI::App& app, int argc, char** argv);

// Adds `--config FILE` (TOML; see the file comment). Call after ConfigureApp.
CLI::Option* AddTomlConfig(CLI::App& app, const std::string& help);

// Accepts a number in [lo, hi]; like CLI::Range, with the bounds written as
// short as they are (1e+09, not 1000000000.000000).
CLI::Validator Between(double lo, double hi);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_BASE_FLAGS_H_

// tickmark report: a session's (or a study's) report as one self-contained
// HTML file, drawn by the Python package's tickmark.report module with
// matplotlib (docs/studies.md, "Report"). This command only finds Debian's
// Python and the package and runs `python3 -m tickmark.report` with the same
// server and token; everything else happens there.
#include <limits.h>
#include <stdlib.h>
#include <unistd.h>

#include <filesystem>
#include <iostream>
#include <memory>
#include <string>
#include <vector>

#include "clients/cli/commands.h"

namespace tickmark::cli {
namespace {

struct ReportFlags {
  std::string session;
  std::string study;
  std::string out;
  std::string python = "/usr/bin/python3";
  std::string ledger;  // for the audit status (tickmark audit verify --ledger)
};

// build/bin/tickmark -> build/python (the package beside the stubs), if it
// is there; an installed package needs none.
std::string PackageDirBesideProgram() {
  std::error_code ec;
  auto exe = std::filesystem::read_symlink("/proc/self/exe", ec);
  if (ec) return "";
  auto dir = exe.parent_path().parent_path() / "python";
  if (std::filesystem::exists(dir / "tickmark" / "report.py", ec)) return dir.string();
  return "";
}

int RunReport(const CommonFlags& common, const ReportFlags& f) {
  if (f.session.empty() == f.study.empty()) {
    std::cerr << "tickmark report: give --session or --study\n";
    return kExitUsage;
  }
  auto conn = Connection::Open(common);
  if (!conn) return kExitError;
  if (access(f.python.c_str(), X_OK) != 0) {
    std::cerr << "tickmark report: cannot run " << f.python
              << " (Debian's python3 with python3-matplotlib is needed; --python names another)\n";
    return kExitError;
  }
  if (std::string dir = PackageDirBesideProgram(); !dir.empty()) {
    const char* old = getenv("PYTHONPATH");
    std::string path = old != nullptr && *old != '\0' ? dir + ":" + old : dir;
    setenv("PYTHONPATH", path.c_str(), 1);
  }
  // The token travels in the environment, never on a command line (which
  // other users can read in /proc).
  setenv("TICKMARK_TOKEN", conn->token().c_str(), 1);
  std::vector<std::string> args = {
      f.python, "-m", "tickmark.report", "--server", common.connection.channel.target,
      "--out",  f.out};
  if (!f.session.empty()) {
    args.insert(args.end(), {"--session", f.session});
  } else {
    args.insert(args.end(), {"--study", f.study});
  }
  if (common.connection.channel.insecure) args.push_back("--insecure");
  if (!common.connection.channel.ca_file.empty()) {
    args.insert(args.end(), {"--ca-file", common.connection.channel.ca_file});
  }
  if (!f.ledger.empty()) args.insert(args.end(), {"--ledger", f.ledger});
  std::error_code ec;
  if (auto self = std::filesystem::read_symlink("/proc/self/exe", ec); !ec) {
    args.insert(args.end(), {"--cli", self.string()});
  }
  std::vector<char*> argv;
  for (std::string& a : args) argv.push_back(a.data());
  argv.push_back(nullptr);
  execv(f.python.c_str(), argv.data());
  std::cerr << "tickmark report: cannot run " << f.python << "\n";
  return kExitError;
}

}  // namespace

void AddReportCommand(CommandTable& table) {
  auto f = std::make_shared<ReportFlags>();
  CLI::App* cmd = table.AddCommand(
      table.root(), "report",
      "Writes a session's report (timeline, feedback per trainer, calibration fits, credit and "
      "labels, clock uncertainty, late and unmatched counts, audit status) or a study's summary "
      "as one self-contained HTML file (figures embedded), through python3 -m tickmark.report.",
      [&table, f] { return RunReport(table.common(), *f); });
  cmd->add_option("--session", f->session, "session id (s-...)");
  cmd->add_option("--study", f->study, "study id (y-...): a summary across its sessions");
  cmd->add_option("--out", f->out, "HTML file to write")->required()->type_name("FILE");
  cmd->add_option("--ledger", f->ledger,
                  "the ledger file (or a copy) to recompute the session's hash chain in for the "
                  "audit status (tickmark audit verify); without it: \"not checked\"")
      ->type_name("FILE");
  cmd->add_option("--python", f->python, "the Python interpreter to run")
      ->capture_default_str()
      ->type_name("PATH");
}

}  // namespace tickmark::cli

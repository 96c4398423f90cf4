// tickmark replay: recompute a session's labels with other kernels.
#include <unistd.h>

#include <iostream>
#include <map>
#include <memory>
#include <sstream>

#include "clients/cli/commands.h"
#include "clients/cli/output.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;

struct ReplayFlags {
  v1::ReplayRequest req;
  std::string trainer_kernels;  // NAME=KERNEL;NAME=KERNEL
};

// Streams the replay's progress (a bar on a terminal) and prints the
// comparison at the end.
int RunReplay(const CommonFlags& common, ReplayFlags& f) {
  std::stringstream list(f.trainer_kernels);
  for (std::string item; std::getline(list, item, ';');) {
    if (item.empty()) continue;
    auto eq = item.find('=');
    if (eq == std::string::npos) {
      std::cerr << "tickmark: --trainer-kernels wants NAME=KERNEL;NAME=KERNEL\n";
      return kExitUsage;
    }
    (*f.req.mutable_trainer_kernels())[item.substr(0, eq)] = item.substr(eq + 1);
  }
  auto conn = Connection::Open(common);
  if (!conn) return kExitError;
  auto ctx = conn->StreamContext();
  auto stub = conn->Admin();
  auto reader = stub.Replay(ctx.get(), f.req);
  v1::ReplayProgress p;
  v1::ReplayComparison result;
  bool finished = false;
  const bool tty = isatty(2);
  while (reader->Read(&p)) {
    if (p.finished()) {
      result = p.result();
      finished = true;
    }
    if (tty && p.total() > 0) {
      const int width = 30;
      const int filled = static_cast<int>(width * p.done() / p.total());
      std::cerr << "\rreplaying [" << std::string(static_cast<size_t>(filled), '#')
                << std::string(static_cast<size_t>(width - filled), ' ') << "] " << p.done()
                << "/" << p.total() << " records" << std::flush;
    }
  }
  if (tty) std::cerr << "\n";
  grpc::Status s = reader->Finish();
  if (!s.ok()) return conn->Fail(s);
  if (!finished) {
    std::cerr << "tickmark: the server ended the replay without a result\n";
    return kExitError;
  }
  std::cout << "derived set '" << f.req.name() << "' stored for " << f.req.session_id() << "\n";
  if (!result.time_set().empty()) {
    std::cout << "event times from time set " << result.time_set() << " ("
              << result.retimed_records() << " feedback and step records)\n";
  }
  // Which kernel each trainer was credited with, and the calibration it came
  // from (sorted by trainer: the map's order is not stable).
  std::map<std::string, std::string> kernels(result.trainer_kernels().begin(),
                                             result.trainer_kernels().end());
  for (const auto& [trainer, kernel] : kernels) {
    auto cal = result.trainer_calibrations().find(trainer);
    std::cout << "trainer " << trainer << ": " << ShortKernelText(kernel);
    if (cal != result.trainer_calibrations().end() && !cal->second.empty()) {
      std::cout << " (calibration " << cal->second << ")";
    } else if (f.req.calibrated()) {
      std::cout << " (no calibration)";
    }
    std::cout << "\n";
  }
  std::cout << "labels compared     " << result.labels() << "\n"
            << "labels changed      " << result.changed() << "\n"
            << "mean |difference|   " << result.mean_abs_difference() << "\n"
            << "max |difference|    " << result.max_abs_difference() << "\n"
            << "sign flips          " << result.sign_flips() << "\n"
            << "credits             " << result.credits() << "\n"
            << "unmatched           " << result.unmatched() << "\n"
            << "only in live set    " << result.only_live() << "\n"
            << "only in replay      " << result.only_replay() << "\n";
  return kExitOk;
}

}  // namespace

void AddReplayCommand(CommandTable& table) {
  auto f = std::make_shared<ReplayFlags>();
  CLI::App* cmd = table.AddCommand(
      table.root(), "replay",
      "Recomputes a session's credit and labels with other delay kernels, stores them as a "
      "named derived set (the session's records stay as they are) and compares the labels "
      "with the live ones.",
      [&table, f] { return RunReplay(table.common(), *f); });
  v1::ReplayRequest& req = f->req;
  cmd->add_option_function<std::string>(
         "--session", [&req](const std::string& v) { req.set_session_id(v); }, "session id")
      ->required();
  cmd->add_option_function<std::string>(
         "--name", [&req](const std::string& v) { req.set_name(v); },
         "name of the derived set to store (e.g. gamma-2-0.28)")
      ->required();
  cmd->add_option_function<std::string>(
      "--kernel", [&req](const std::string& v) { req.set_kernel(v); },
      "kernel for every trainer (e.g. gamma:2,0.28); default: as recorded");
  cmd->add_option("--trainer-kernels", f->trainer_kernels,
                  "per-trainer kernels: NAME=KERNEL;NAME=KERNEL");
  cmd->add_flag_callback(
      "--calibrated", [&req] { req.set_calibrated(true); },
      "credit each calibrated trainer with their latest calibration (made before the replay); "
      "--kernel and --trainer-kernels still take precedence");
  cmd->add_flag_callback("--overwrite", [&req] { req.set_overwrite(true); },
                         "replace a derived set of the same name");
  CLI::Option* retimed = cmd->add_flag_callback(
      "--retimed", [&req] { req.set_time_set("latest"); },
      "credit with the event times of the session's newest time set (tickmark retime)");
  cmd->add_option_function<std::string>(
         "--time-set", [&req](const std::string& v) { req.set_time_set(v); },
         "credit with the event times of this time set (an id tickmark retime printed)")
      ->excludes(retimed);
}

}  // namespace tickmark::cli

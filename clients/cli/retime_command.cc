// tickmark retime: recompute a session's event times with probes on both
// sides of each event and store them as a derived time set.
#include <unistd.h>

#include <iostream>
#include <map>
#include <memory>

#include "clients/cli/commands.h"
#include "clients/cli/output.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;

// Streams the retiming's progress (a bar on a terminal) and prints the
// summary: how far the times moved and how the uncertainties changed.
int RunRetime(const CommonFlags& common, const v1::RetimeRequest& req) {
  auto conn = Connection::Open(common);
  if (!conn) return kExitError;
  auto ctx = conn->StreamContext();
  auto stub = conn->Admin();
  auto reader = stub.Retime(ctx.get(), req);
  v1::RetimeResponse p;
  v1::RetimeResponse result;
  bool finished = false;
  const bool tty = isatty(2);
  while (reader->Read(&p)) {
    if (p.finished()) {
      result = p;
      finished = true;
    }
    if (tty && p.total() > 0) {
      const int width = 30;
      const int filled = static_cast<int>(width * p.done() / p.total());
      std::cerr << "\rretiming [" << std::string(static_cast<size_t>(filled), '#')
                << std::string(static_cast<size_t>(width - filled), ' ') << "] " << p.done() << "/"
                << p.total() << " records" << std::flush;
    }
  }
  if (tty) std::cerr << "\n";
  grpc::Status s = reader->Finish();
  if (!s.ok()) return conn->Fail(s);
  if (!finished) {
    std::cerr << "tickmark: the server ended the retiming without a result\n";
    return kExitError;
  }
  std::cout << "time set " << result.time_set() << " stored for " << req.session_id()
            << " (records 1.." << result.through_sequence() << ")\n";
  std::cout << "event times          " << result.events()
            << " (feedback events, step starts and ends) from " << result.clocks()
            << " client clock" << (result.clocks() == 1 ? "" : "s") << "\n";
  std::cout << "retimed              " << result.retimed();
  if (result.retimed() < result.events()) {
    // Sorted by reason: the map's order is not stable.
    std::map<std::string, uint64_t> kept(result.kept().begin(), result.kept().end());
    std::cout << " (live time kept:";
    for (const auto& [why, n] : kept) std::cout << " " << why << " " << n;
    std::cout << ")";
  }
  std::cout << "\n";
  if (result.retimed() > 0) {
    std::cout << "moved from live      median " << FormatMillis(result.moved_p50_ns()) << ", p95 "
              << FormatMillis(result.moved_p95_ns()) << ", max "
              << FormatMillis(result.moved_max_ns()) << "\n"
              << "uncertainty live     median " << FormatMillis(result.live_uncertainty_p50_ns())
              << ", p95 " << FormatMillis(result.live_uncertainty_p95_ns()) << "\n"
              << "uncertainty retimed  median " << FormatMillis(result.retimed_uncertainty_p50_ns())
              << ", p95 " << FormatMillis(result.retimed_uncertainty_p95_ns()) << "\n";
    if (result.live_uncertainty_p50_ns() > 0) {
      const double change = 100.0 *
                            static_cast<double>(result.retimed_uncertainty_p50_ns() -
                                                result.live_uncertainty_p50_ns()) /
                            static_cast<double>(result.live_uncertainty_p50_ns());
      char pct[32];
      std::snprintf(pct, sizeof pct, "%+.1f%%", change);
      std::cout << "uncertainty change   " << pct << " at the median; narrower for "
                << result.narrower() << " of " << result.retimed() << " retimed\n";
    }
  }
  std::cout << "credit with it:      tickmark replay --session " << req.session_id()
            << " --name NAME --time-set " << result.time_set() << "\n";
  return kExitOk;
}

}  // namespace

void AddRetimeCommand(CommandTable& table) {
  auto req = std::make_shared<v1::RetimeRequest>();
  CLI::App* cmd = table.AddCommand(
      table.root(), "retime",
      "Recomputes a session's event times (feedback events, step starts and ends) with the "
      "probes before and after each event, stores them as a derived time set (the session's "
      "records stay as they are) and prints how far they moved and how the uncertainties "
      "changed. Use the set with 'tickmark replay --retimed'.",
      [&table, req] { return RunRetime(table.common(), *req); });
  cmd->add_option_function<std::string>(
         "--session", [req](const std::string& v) { req->set_session_id(v); }, "session id")
      ->required();
  cmd->add_option_function<double>(
         "--half-window-s", [req](double v) { req->set_half_window_s(v); },
         "probes within this many seconds of an event bound it (widened until enough); "
         "default 30")
      ->check(tickmark::Between(0.1, 3600));
}

}  // namespace tickmark::cli

// tickmark session create|list|show|close.
#include <cstdio>
#include <iomanip>
#include <iostream>
#include <memory>
#include <string>
#include <vector>

#include "clients/cli/commands.h"
#include "clients/cli/output.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;
using Admin = v1::SessionAdmin::Stub;

const char* StateWord(v1::SessionState state) {
  return state == v1::SESSION_STATE_OPEN ? "open" : "closed";
}

void PrintSummaryLine(const v1::SessionSummary& s) {
  std::cout << std::left << std::setw(12) << s.session().id() << std::setw(8)
            << StateWord(s.session().state()) << std::setw(28)
            << FormatUtc(s.session().opened_session_ns()) << std::right << std::setw(9)
            << s.feedback_count() << std::setw(9) << s.step_count() << std::setw(7)
            << s.connected_clients() << "  " << std::left << std::setw(32)
            << (s.default_kernel().empty() ? "-" : s.default_kernel()) << " "
            << s.session().title() << "\n";
}

// The ledger's write state as operators read it; empty from a server too
// old to report it.
std::string LedgerState(const v1::SessionSummary& s) {
  if (!s.has_ledger_health()) return "";
  if (s.ledger_health().writable()) return "writable";
  return "NOT WRITABLE: " + s.ledger_health().reason() +
         " (writes resume by themselves once the cause is gone; see DEVELOPERS.md, "
         "Failure states and recovery)";
}

// The clock table of `session show`: each connected client's clock as the
// server models it now; a client whose uncertainty exceeds `max_ms` is
// flagged with '!' and named below the table.
void PrintClocks(const v1::SessionSummary& r, double max_ms) {
  if (r.clocks().empty()) {
    std::cout << "clocks     none connected\n";
    return;
  }
  std::cout << "clocks     as modelled now (flagged '!': uncertainty above " << max_ms << " ms)\n";
  std::cout << "    " << std::left << std::setw(24) << "CLIENT" << std::setw(9) << "ROLE"
            << std::setw(12) << "SUBJECT" << std::right << std::setw(22) << "OFFSET"
            << std::setw(12) << "DRIFT" << std::setw(14) << "UNCERTAINTY" << std::setw(8)
            << "PROBES" << std::setw(10) << "REJECTED" << std::setw(11) << "UDP DROPS"
            << std::setw(12) << "UPDATED"
            << "\n";
  std::vector<std::string> flagged;
  for (const v1::ClientClock& c : r.clocks()) {
    const double u_ms = static_cast<double>(c.uncertainty_ns()) * 1e-6;
    const bool flag = u_ms > max_ms;
    char offset[48], drift[32], updated[32];
    // Client clocks often count from boot while session time is UTC: the
    // offset may be decades, so seconds with microseconds.
    std::snprintf(offset, sizeof offset, "%+.6f s", static_cast<double>(c.offset_ns()) * 1e-9);
    if (c.probed()) {
      std::snprintf(drift, sizeof drift, "%+.1f ppm", c.drift_ppm());
    } else {
      std::snprintf(drift, sizeof drift, "-");
    }
    std::snprintf(updated, sizeof updated, "%.1f s ago",
                  static_cast<double>(c.since_update_ns()) * 1e-9);
    std::cout << "  " << (flag ? "! " : "  ") << std::left << std::setw(24) << c.client_id()
              << std::setw(9) << RoleWord(c.role()) << std::setw(12)
              << (c.subject().empty() ? "-" : c.subject()) << std::right << std::setw(22) << offset
              << std::setw(12) << drift << std::setw(14) << FormatMillis(c.uncertainty_ns())
              << std::setw(8) << c.probes() << std::setw(10) << c.rejected_probes() << std::setw(11)
              << c.udp_probe_drops() << std::setw(12) << updated << "\n";
    if (flag) {
      flagged.push_back(c.client_id() + ": uncertainty " + FormatMillis(c.uncertainty_ns()) +
                        (c.probed() ? "" : " (no probe answered yet)"));
    }
  }
  for (const std::string& f : flagged) {
    std::cout << "  ! " << f << " exceeds " << max_ms << " ms\n";
  }
}

void AddCreate(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::CreateSessionRequest>();
  auto token_out = std::make_shared<std::string>();
  CLI::App* cmd = table.AddCommand(
      group, "create", "Opens a session and prints its id and admin token.", [&table, req, token_out] {
        // With --condition, --study names a study made with `tickmark study create`.
        if (!req->condition().empty() || !req->participants().empty()) {
          if (req->study().empty()) {
            std::cerr << "tickmark session create: --condition and --participant need --study "
                         "STUDY_ID (see tickmark study --help)\n";
            return kExitUsage;
          }
          req->set_study_id(req->study());
          req->clear_study();
        }
        return CallAdmin<v1::CreateSessionRequest, v1::CreateSessionResponse>(
            table.common(), &Admin::CreateSession, *req, [&](const v1::CreateSessionResponse& r) {
              std::cout << "session " << r.session().id() << " opened at "
                        << FormatUtc(r.session().opened_session_ns()) << "\n";
              if (!r.session().condition().empty()) {
                std::cout << "study " << r.session().study() << ", condition "
                          << r.session().condition() << ", participants";
                for (const auto& p : r.session().participants()) std::cout << " " << p;
                std::cout << " (study record #" << r.session().study_sequence() << ")\n";
              }
              if (!token_out->empty()) {
                if (!WriteSecretFile(*token_out, r.admin_secret())) return kExitError;
                std::cout << "admin token " << r.admin_token().token_id() << " written to "
                          << *token_out << "\n";
              } else {
                std::cout << "admin token " << r.admin_token().token_id() << ": "
                          << r.admin_secret() << "\n(shown once; keep it secret)\n";
              }
              return kExitOk;
            });
      });
  cmd->add_option_function<std::string>(
         "--title", [req](const std::string& v) { req->set_title(v); },
         "what the session is (\"dock rover, pilot 3\")")
      ->required();
  cmd->add_option_function<std::string>(
      "--study", [req](const std::string& v) { req->set_study(v); },
      "study the session belongs to: free text, or with --condition a study id (y-...) made "
      "with `tickmark study create`");
  cmd->add_option_function<std::string>(
      "--condition", [req](const std::string& v) { req->set_condition(v); },
      "the study's condition whose settings (kernel, pinning, lateness) the session takes");
  cmd->add_option_function<std::vector<std::string>>(
      "--participant",
      [req](const std::vector<std::string>& v) {
        for (const auto& p : v) req->add_participants(p);
      },
      "participant pseudonym enrolled in the study (repeat for several)");
  cmd->add_option_function<std::string>(
      "--kernel", [req](const std::string& v) { req->set_default_kernel(v); },
      "default delay kernel, e.g. uniform:0.2,4.0 or gamma:2,0.28 (seconds); default: the "
      "server's");
  cmd->add_flag_callback(
      "--pin-kernels", [req] { req->set_pin_kernels(true); },
      "trainers credit with the session's kernels only: a calibrated trainer joining does not "
      "get their calibration");
  cmd->add_option("--token-out", *token_out,
                  "write the session's admin token to this file (0600)")
      ->type_name("FILE");
}

void AddSessionList(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::ListSessionsRequest>();
  CLI::App* cmd = table.AddCommand(
      group, "list", "Lists sessions with their counts (open ones unless --all).", [&table, req] {
        return CallAdmin<v1::ListSessionsRequest, v1::ListSessionsResponse>(
            table.common(), &Admin::ListSessions, *req, [&](const v1::ListSessionsResponse& r) {
              std::cout << std::left << std::setw(12) << "SESSION" << std::setw(8) << "STATE"
                        << std::setw(28) << "OPENED" << std::right << std::setw(9)
                        << "FEEDBACK" << std::setw(9) << "STEPS" << std::setw(7) << "LIVE"
                        << "  " << std::left << std::setw(32) << "KERNEL" << " TITLE\n";
              for (const auto& s : r.sessions()) PrintSummaryLine(s);
              if (!r.sessions().empty()) {
                const std::string state = LedgerState(r.sessions(0));
                if (!state.empty() && state != "writable") std::cout << "ledger " << state << "\n";
              }
              if (r.sessions().empty()) {
                std::cout << (req->include_closed() ? "(no sessions)\n"
                                                    : "(no sessions open; --all shows closed "
                                                      "ones)\n");
              }
              return kExitOk;
            });
      });
  cmd->add_flag_callback("--all", [req] { req->set_include_closed(true); },
                         "include closed sessions");
}

void AddSessionShow(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::GetSessionRequest>();
  auto max_ms = std::make_shared<double>(50);
  CLI::App* cmd = table.AddCommand(
      group, "show",
      "Shows one session in detail, with its counts and the clocks of its connected clients.",
      [&table, req, max_ms] {
        return CallAdmin<v1::GetSessionRequest, v1::SessionSummary>(
            table.common(), &Admin::GetSession, *req, [max_ms](const v1::SessionSummary& r) {
              const auto& ss = r.session();
              std::string participants;
              for (const auto& p : ss.participants()) {
                participants += (participants.empty() ? "" : " ") + p;
              }
              std::cout << "session    " << ss.id() << "\n"
                        << "title      " << ss.title() << "\n"
                        << "study      " << (ss.study().empty() ? "-" : ss.study())
                        << (r.study_name().empty() ? "" : " (" + r.study_name() + ")") << "\n"
                        << (ss.condition().empty() ? "" : "condition  " + ss.condition() + "\n")
                        << (participants.empty() ? "" : "participants " + participants + "\n")
                        << "state      " << StateWord(ss.state()) << "\n"
                        << "kernel     "
                        << (r.default_kernel().empty() ? "-" : r.default_kernel()) << "\n"
                        << (ss.pin_kernels() ? "kernels    pinned (calibrations are not applied "
                                               "on joining)\n"
                                             : "")
                        << "ledger     "
                        << (LedgerState(r).empty() ? "-" : LedgerState(r)) << "\n"
                        << "opened     " << FormatUtc(ss.opened_session_ns()) << "\n"
                        << "closed     " << FormatUtc(ss.closed_session_ns()) << "\n"
                        << "records    " << ss.last_sequence() << "\n"
                        << "feedback   " << r.feedback_count() << "\n"
                        << "steps      " << r.step_count() << "\n"
                        << "probes     " << r.probe_count() << " ("
                        << r.rejected_probe_count() << " rejected)\n"
                        << "markers    " << r.marker_count() << "\n"
                        << (r.sync_pulse_count() > 0
                                ? "sync       " + std::to_string(r.sync_pulse_count()) +
                                      " pulse edges (docs/sync.md)\n"
                                : std::string())
                        << "clients    " << r.client_count() << " (" << r.connected_clients()
                        << " connected now)\n"
                        << "late       " << r.late_count() << "\n"
                        << "unmatched  " << r.unmatched_count() << "\n"
                        << "server     "
                        << (r.server_version().empty() ? "-" : r.server_version())
                        << " (wire contract "
                        << (r.contract_version().empty() ? "-" : r.contract_version()) << ")\n";
              PrintClocks(r, *max_ms);
              return kExitOk;
            });
      });
  cmd->add_option_function<std::string>(
         "ID", [req](const std::string& v) { req->set_session_id(v); }, "session id")
      ->required();
  cmd->add_option("--max-uncertainty-ms", *max_ms,
                  "flag a client whose clock uncertainty exceeds this (milliseconds)")
      ->check(tickmark::Between(0.001, 1e9))
      ->capture_default_str();
}

void AddClose(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::CloseSessionRequest>();
  CLI::App* cmd = table.AddCommand(
      group, "close", "Ends a session: its streams end and no record is taken after.",
      [&table, req] {
        return CallAdmin<v1::CloseSessionRequest, v1::Session>(
            table.common(), &Admin::CloseSession, *req, [&table](const v1::Session& r) {
              std::cout << "session " << r.id() << " closed at "
                        << FormatUtc(r.closed_session_ns()) << " (" << r.last_sequence()
                        << " records)\n";
              // The signed receipt (docs/audit.md): keep it to prove the
              // ledger later (tickmark audit verify --receipt).
              std::cout << "receipt (save it; tickmark audit receipt --session " << r.id()
                        << " prints it again):\n";
              PrintReceiptOf(table.common(), r.id());
              return kExitOk;
            });
      });
  cmd->add_option_function<std::string>(
         "ID", [req](const std::string& v) { req->set_session_id(v); }, "session id")
      ->required();
}

}  // namespace

void AddSessionCommands(CommandTable& table) {
  CLI::App* group = table.AddGroup("session", "open, list, show and close sessions");
  AddCreate(table, group);
  AddSessionList(table, group);
  AddSessionShow(table, group);
  AddClose(table, group);
}

}  // namespace tickmark::cli

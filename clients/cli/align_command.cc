// tickmark align: fit another recorder's pulse times to a session's sync
// pulses (docs/sync.md, "Aligning"); the method is in align.h.
#include <cmath>
#include <cstdio>
#include <fstream>
#include <iostream>
#include <map>
#include <memory>
#include <set>
#include <sstream>

#include "clients/cli/align.h"
#include "clients/cli/commands.h"
#include "server/base/strings.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;

struct AlignFlags {
  std::string session;
  std::string session_pulses;  // offline: a sync_pulses.csv instead of the server
  std::string pulses;
  std::string column;
  std::string out;
  std::string residuals;
  std::string pulses_out;
  std::string direction = "out";
  std::string edge = "rising";
  std::string line;
  std::string client;
  double tolerance_ms = 50;
  size_t min_pairs = 8;
};

// One session pulse as align uses it (from the ledger or a sync_pulses.csv).
struct Pulse {
  v1::SyncPulse p;
  uint64_t seq = 0;
  double session_s = 0;  // seconds since the session opened
};

constexpr char kPulsesHeader[] =
    "session_id,seq,client_id,trainer,direction,line,level,edge,reason,pulse_index,marker_seq,"
    "event_source_ns,source_uncertainty_ns,event_session_ns,session_s,uncertainty_ns,"
    "arrival_session_ns,device,simulated";

std::string Word(const std::string& enum_name, const std::string& prefix) {
  std::string w = enum_name.substr(enum_name.rfind(prefix) == 0 ? prefix.size() : 0);
  for (char& c : w) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return w;
}

std::string Quoted(const std::string& s) {
  if (s.find_first_of(",\"\n") == std::string::npos) return s;
  std::string out = "\"";
  for (char c : s) out += c == '"' ? std::string("\"\"") : std::string(1, c);
  return out + "\"";
}

std::string Seconds(double s) {
  char buf[40];
  std::snprintf(buf, sizeof buf, "%.9f", s);
  return buf;
}

std::string Num(double v) {
  char buf[40];
  std::snprintf(buf, sizeof buf, "%.17g", v);
  return buf;
}

absl::Status WritePulsesCsv(const std::string& path, const std::string& session,
                            const std::vector<Pulse>& pulses) {
  std::ofstream f(path, std::ios::trunc);
  if (!f) return absl::UnavailableError("cannot write " + path);
  f << kPulsesHeader << "\n";
  for (const Pulse& x : pulses) {
    const v1::SyncPulse& p = x.p;
    f << Quoted(session) << "," << x.seq << "," << Quoted(p.client_id()) << ","
      << Quoted(p.trainer()) << ","
      << Word(v1::SyncDirection_Name(p.direction()), "SYNC_DIRECTION_") << "," << p.line() << ","
      << (p.level() ? 1 : 0) << "," << (p.level() ? "rising" : "falling") << ","
      << Word(v1::SyncReason_Name(p.reason()), "SYNC_REASON_") << "," << p.pulse_index() << ","
      << (p.marker_sequence() == 0 ? std::string() : std::to_string(p.marker_sequence())) << ","
      << p.event_source_ns() << "," << p.source_uncertainty_ns() << "," << p.event_session_ns()
      << "," << Seconds(x.session_s) << "," << p.uncertainty_ns() << "," << p.arrival_session_ns()
      << "," << Quoted(p.device()) << "," << (p.simulated() ? 1 : 0) << "\n";
  }
  f.close();
  if (!f) return absl::UnavailableError("write failed: " + path);
  return absl::OkStatus();
}

// The session's sync pulses and its opening time, from the server.
absl::StatusOr<std::vector<Pulse>> ReadSessionPulses(Connection& conn, const std::string& session,
                                                     int* exit_code) {
  v1::SubscribeRequest req;
  req.set_session_id(session);
  req.set_stop_at_end(true);
  req.add_kinds(v1::RECORD_KIND_SESSION_EVENT);
  req.add_kinds(v1::RECORD_KIND_SYNC_PULSE);
  int64_t opened_ns = 0;
  std::vector<Pulse> pulses;
  grpc::Status s = conn.ReadRecords(req, [&](const v1::Record& r) {
    if (r.has_session_event() && r.session_event().event() == v1::SessionEvent::KIND_OPENED &&
        opened_ns == 0) {
      opened_ns = r.written_session_ns();
    }
    if (r.has_sync_pulse()) pulses.push_back(Pulse{r.sync_pulse(), r.sequence(), 0});
  });
  if (!s.ok()) {
    *exit_code = conn.Fail(s);
    return absl::UnknownError("reported");
  }
  for (Pulse& p : pulses) {
    p.session_s = static_cast<double>(p.p.event_session_ns() - opened_ns) / 1e9;
  }
  return pulses;
}

// A sync_pulses.csv (as written by --pulses-out) read back.
absl::StatusOr<std::vector<Pulse>> ReadPulsesCsv(const std::string& path) {
  std::ifstream f(path);
  if (!f) return absl::NotFoundError("cannot read " + path);
  std::string line;
  if (!std::getline(f, line)) return absl::InvalidArgumentError(path + ": empty");
  if (!line.empty() && line.back() == '\r') line.pop_back();
  std::map<std::string, size_t> col;
  {
    std::stringstream ss(line);
    std::string name;
    for (size_t i = 0; std::getline(ss, name, ','); ++i) col[name] = i;
  }
  if (col.count("session_s") == 0) {
    return absl::InvalidArgumentError(path +
                                      ": no session_s column (a sync_pulses.csv from "
                                      "tickmark align --pulses-out is expected)");
  }
  std::vector<Pulse> out;
  int n = 1;
  while (std::getline(f, line)) {
    ++n;
    if (!line.empty() && line.back() == '\r') line.pop_back();
    if (line.empty()) continue;
    std::vector<std::string> cells;
    std::stringstream ss(line);
    for (std::string c; std::getline(ss, c, ',');) cells.push_back(c);
    auto cell = [&](const char* name) -> std::string {
      auto it = col.find(name);
      return it == col.end() || it->second >= cells.size() ? std::string() : cells[it->second];
    };
    Pulse p;
    char* end = nullptr;
    const std::string t = cell("session_s");
    p.session_s = std::strtod(t.c_str(), &end);
    if (t.empty() || *end != '\0') {
      return absl::InvalidArgumentError(Cat(path, ":", n, ": session_s is not a number"));
    }
    const std::string dir = cell("direction");
    p.p.set_direction(dir == "in" ? v1::SYNC_DIRECTION_IN : v1::SYNC_DIRECTION_OUT);
    p.p.set_level(cell("level") != "0");
    p.p.set_line(cell("line"));
    p.p.set_client_id(cell("client_id"));
    p.p.set_pulse_index(std::strtoull(cell("pulse_index").c_str(), nullptr, 10));
    p.p.set_marker_sequence(std::strtoull(cell("marker_seq").c_str(), nullptr, 10));
    p.p.set_event_session_ns(std::strtoll(cell("event_session_ns").c_str(), nullptr, 10));
    p.seq = std::strtoull(cell("seq").c_str(), nullptr, 10);
    out.push_back(std::move(p));
  }
  return out;
}

int RunAlign(const CommonFlags& common, const AlignFlags& f) {
  if (f.session.empty() == f.session_pulses.empty()) {
    std::cerr << "tickmark align: give --session (read from the server) or --session-pulses "
                 "(a sync_pulses.csv), not both\n";
    return kExitUsage;
  }
  std::vector<Pulse> all;
  if (!f.session.empty()) {
    auto conn = Connection::Open(common);
    if (!conn) return kExitError;
    int code = kExitError;
    auto read = ReadSessionPulses(*conn, f.session, &code);
    if (!read.ok()) return code;
    all = *std::move(read);
  } else {
    auto read = ReadPulsesCsv(f.session_pulses);
    if (!read.ok()) {
      std::cerr << "tickmark align: " << read.status().message() << "\n";
      return kExitUsage;
    }
    all = *std::move(read);
  }
  if (!f.pulses_out.empty()) {
    if (absl::Status s = WritePulsesCsv(f.pulses_out, f.session, all); !s.ok()) {
      std::cerr << "tickmark align: " << s.message() << "\n";
      return kExitError;
    }
    std::cerr << "wrote " << all.size() << " sync pulses to " << f.pulses_out << "\n";
    if (f.pulses.empty()) return kExitOk;  // only the table was wanted
  }
  if (f.pulses.empty()) {
    std::cerr << "tickmark align: --pulses FILE (the other recorder's pulse times) is needed, "
                 "unless only --pulses-out is wanted\n";
    return kExitUsage;
  }

  // The pulses to fit: one direction, one kind of edge, one line, one client.
  std::vector<Pulse> chosen;
  std::set<std::string> clients, lines;
  for (const Pulse& p : all) {
    const bool out = p.p.direction() == v1::SYNC_DIRECTION_OUT;
    if ((f.direction == "out") != out) continue;
    if (f.edge == "rising" && !p.p.level()) continue;
    if (f.edge == "falling" && p.p.level()) continue;
    if (!f.line.empty() && p.p.line() != f.line) continue;
    if (!f.client.empty() && p.p.client_id() != f.client) continue;
    clients.insert(p.p.client_id());
    lines.insert(p.p.line());
    chosen.push_back(p);
  }
  if (clients.size() > 1 || lines.size() > 1) {
    std::cerr << "tickmark align: the session has " << f.direction << " pulses of "
              << clients.size() << " clients on " << lines.size()
              << " lines; choose one with --client and --line\n";
    return kExitUsage;
  }
  std::ifstream in(f.pulses);
  if (!in) {
    std::cerr << "tickmark align: cannot read " << f.pulses << "\n";
    return kExitUsage;
  }
  std::stringstream text;
  text << in.rdbuf();
  auto other = ReadCsvColumn(text.str(), f.column, f.pulses);
  if (!other.ok()) {
    std::cerr << "tickmark align: " << other.status().message() << "\n";
    return kExitUsage;
  }
  std::vector<double> session_s;
  for (const Pulse& p : chosen) session_s.push_back(p.session_s);
  AlignOptions opt;
  opt.tolerance_s = f.tolerance_ms / 1e3;
  opt.min_pairs = f.min_pairs;
  auto fit = AlignPulses(session_s, *other, opt);
  if (!fit.ok()) {
    std::cerr << "tickmark align: " << fit.status().message() << "\n";
    return kExitError;
  }
  const AlignResult& r = *fit;
  std::cout << "pulses         session " << session_s.size() << " (" << f.direction << ", "
            << f.edge << " edges), other " << other->size() << ", paired " << r.pairs.size();
  if (r.trimmed > 0) std::cout << " (" << r.trimmed << " outliers dropped)";
  std::cout << "\n";
  std::printf("map            other_s = %.9f + %.12f * session_s\n", r.a, r.b);
  std::printf("offset         %.6f s (± %.6f s, 1 standard error)\n", r.a, r.a_se);
  std::printf("drift          %+.3f ppm (± %.3f ppm)\n", r.drift_ppm(), r.b_se * 1e6);
  std::printf("residuals      RMS %.3f ms, max %.3f ms\n", r.rms_s * 1e3, r.max_abs_s * 1e3);
  std::printf("unpaired       session %zu, other %zu\n", session_s.size() - r.pairs.size(),
              other->size() - r.pairs.size());
  std::printf("  (session_s: seconds since the session opened, on session time)\n");

  const std::string residuals = !f.residuals.empty()
                                    ? f.residuals
                                    : (f.out.empty() ? std::string() : f.out + ".residuals.csv");
  if (!f.out.empty()) {
    std::ofstream o(f.out, std::ios::trunc);
    o << "{\n  \"session\": \"" << f.session << "\",\n"
      << "  \"model\": \"other_s = a + b * session_s\",\n"
      << "  \"session_s\": \"seconds since the session opened (session time)\",\n"
      << "  \"a\": " << Num(r.a) << ",\n  \"b\": " << Num(r.b) << ",\n"
      << "  \"a_se\": " << Num(r.a_se) << ",\n  \"b_se\": " << Num(r.b_se) << ",\n"
      << "  \"offset_s\": " << Num(r.a) << ",\n  \"drift_ppm\": " << Num(r.drift_ppm()) << ",\n"
      << "  \"pairs\": " << r.pairs.size() << ",\n  \"trimmed\": " << r.trimmed << ",\n"
      << "  \"session_pulses\": " << session_s.size() << ",\n"
      << "  \"other_pulses\": " << other->size() << ",\n"
      << "  \"rms_residual_s\": " << Num(r.rms_s) << ",\n"
      << "  \"max_abs_residual_s\": " << Num(r.max_abs_s) << ",\n"
      << "  \"tolerance_s\": " << Num(opt.tolerance_s) << ",\n"
      << "  \"direction\": \"" << f.direction << "\",\n  \"edge\": \"" << f.edge << "\",\n"
      << "  \"residuals\": \"" << residuals << "\"\n}\n";
    o.close();
    if (!o) {
      std::cerr << "tickmark align: cannot write " << f.out << "\n";
      return kExitError;
    }
  }
  if (!residuals.empty()) {
    std::ofstream o(residuals, std::ios::trunc);
    o << "session_seq,pulse_index,marker_seq,session_s,other_row,other_s,fitted_other_s,"
         "residual_s\n";
    for (const AlignPair& p : r.pairs) {
      const Pulse& sp = chosen[p.session_index];
      o << sp.seq << "," << sp.p.pulse_index() << ","
        << (sp.p.marker_sequence() == 0 ? std::string() : std::to_string(sp.p.marker_sequence()))
        << "," << Num(p.session_s) << "," << p.other_index + 1 << "," << Num(p.other_s) << ","
        << Num(r.a + r.b * p.session_s) << "," << Num(p.residual_s) << "\n";
    }
    o.close();
    if (!o) {
      std::cerr << "tickmark align: cannot write " << residuals << "\n";
      return kExitError;
    }
    std::cerr << "wrote the map to " << (f.out.empty() ? "(none)" : f.out)
              << " and the per-pulse residuals to " << residuals << "\n";
  }
  return kExitOk;
}

}  // namespace

void AddAlignCommand(CommandTable& table) {
  auto f = std::make_shared<AlignFlags>();
  CLI::App* cmd = table.AddCommand(
      table.root(), "align",
      "Fits another recorder's sync pulse times to a session's sync pulses "
      "(other_s = a + b * session_s by least squares after a robust pairing) and reports offset, "
      "drift and residuals; docs/sync.md.",
      [&table, f] { return RunAlign(table.common(), *f); });
  cmd->add_option("--session", f->session, "session id (read its sync pulses from the server)");
  cmd->add_option("--session-pulses", f->session_pulses,
                  "a sync_pulses.csv written earlier by --pulses-out, instead of --session")
      ->type_name("FILE");
  cmd->add_option("--pulses", f->pulses,
                  "CSV of the other recorder's pulse times in seconds, one per row (header "
                  "allowed)")
      ->type_name("FILE");
  cmd->add_option("--column", f->column,
                  "the column holding the times: header name or 1-based number (default: first)");
  cmd->add_option("--out", f->out, "write the map (JSON) here")->type_name("FILE");
  cmd->add_option("--residuals", f->residuals,
                  "write the per-pulse residuals (CSV) here (default: <out>.residuals.csv)")
      ->type_name("FILE");
  cmd->add_option("--pulses-out", f->pulses_out,
                  "write the session's sync pulses (every edge, both directions) as CSV here")
      ->type_name("FILE");
  cmd->add_option("--direction", f->direction, "which pulses to fit: out (driven) or in (seen)")
      ->check(CLI::IsMember({"out", "in"}))
      ->capture_default_str();
  cmd->add_option("--edge", f->edge,
                  "which edges: rising (pulse starts), falling, or both (toggle mode)")
      ->check(CLI::IsMember({"rising", "falling", "both"}))
      ->capture_default_str();
  cmd->add_option("--line", f->line, "only this line (DTR, RTS, CTS, DSR, DCD)");
  cmd->add_option("--client", f->client, "only this client id");
  cmd->add_option("--tolerance", f->tolerance_ms,
                  "milliseconds a pulse may land from its partner when pairing")
      ->check(CLI::Range(0.001, 10000.0))
      ->capture_default_str();
  cmd->add_option("--min-pairs", f->min_pairs, "refuse with fewer paired pulses")
      ->check(CLI::Range(3, 1000000))
      ->capture_default_str();
}

}  // namespace tickmark::cli

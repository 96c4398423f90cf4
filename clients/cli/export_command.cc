// tickmark export: a session's records as JSON Lines, or (--format csv) a
// session's or a study's records as one CSV per record kind with a codebook
// (csv_export.h; docs/studies.md).
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <chrono>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <map>
#include <memory>
#include <sstream>

#include "clients/cli/commands.h"
#include "clients/cli/csv_export.h"
#include "clients/cli/jsonl.h"
#include "clients/cli/output.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;

struct ExportFlags {
  std::string session;
  std::string out_path;
  std::string kinds;
  int64_t from = 1;
  bool follow = false;
  std::string format = "jsonl";
  std::string study;
};

// sessions.csv: one row per exported session (not a record kind: from
// GetSession), so a study's tables can be joined with conditions.
const char* kSessionsHeader[] = {"session_id",        "title",        "study",
                                 "condition",         "participants", "opened_session_ns",
                                 "closed_session_ns", "records"};
const char* kSessionsCodebook[][5] = {
    {"session_id", "string", "", "", "the session (s-...)"},
    {"title", "string", "", "", "free text given at creation"},
    {"study", "string", "", "", "the study (y-...) or free text"},
    {"condition", "string", "", "", "the study condition whose settings the session took"},
    {"participants", "string", "", "", "participant pseudonyms, separated by ';'"},
    {"opened_session_ns", "integer", "ns", "session time", "when the session opened"},
    {"closed_session_ns", "integer", "ns", "session time", "when it closed; 0: still open"},
    {"records", "integer", "", "", "records in the session's journal"},
};

int RunCsv(const CommonFlags& common, const ExportFlags& f) {
  if (f.out_path.empty()) {
    std::cerr << "tickmark export: --format csv needs --out DIR\n";
    return kExitUsage;
  }
  if (f.follow || f.from != 1 || !f.kinds.empty()) {
    std::cerr << "tickmark export: --follow, --from and --kinds are for --format jsonl\n";
    return kExitUsage;
  }
  if (f.session.empty() == f.study.empty()) {
    std::cerr << "tickmark export: give --session or --study\n";
    return kExitUsage;
  }
  auto conn = Connection::Open(common);
  if (!conn) return kExitError;
  std::vector<std::string> sessions;
  if (!f.study.empty()) {
    v1::GetStudyRequest req;
    req.set_study_id(f.study);
    v1::Study study;
    auto ctx = conn->Context();
    if (grpc::Status s = conn->Admin().GetStudy(ctx.get(), req, &study); !s.ok()) {
      return conn->Fail(s);
    }
    for (const auto& e : study.sessions()) sessions.push_back(e.session_id());
  } else {
    sessions.push_back(f.session);
  }
  std::error_code ec;
  std::filesystem::create_directories(f.out_path, ec);
  if (ec) {
    std::cerr << "tickmark export: cannot create " << f.out_path << ": " << ec.message() << "\n";
    return kExitError;
  }
  const std::filesystem::path dir(f.out_path);
  auto write_file = [](const std::filesystem::path& path, const std::string& text) {
    std::ofstream out(path, std::ios::binary | std::ios::trunc);
    out << text;
    out.flush();
    if (!out) {
      std::cerr << "tickmark export: cannot write " << path.string() << "\n";
      return false;
    }
    return true;
  };
  // Every table gets its file and header, empty or not.
  std::map<std::string, std::ofstream> files;
  std::map<std::string, uint64_t> rows;
  for (const CsvTable& t : CsvTables()) {
    auto& out = files[t.file];
    out.open(dir / t.file, std::ios::binary | std::ios::trunc);
    if (!out) {
      std::cerr << "tickmark export: cannot write " << (dir / t.file).string() << "\n";
      return kExitError;
    }
    out << CsvHeader(t);
    rows[t.file] = 0;
  }
  std::string sessions_csv =
      CsvRow(std::vector<std::string>(std::begin(kSessionsHeader), std::end(kSessionsHeader)));
  for (const std::string& id : sessions) {
    v1::GetSessionRequest get;
    get.set_session_id(id);
    v1::SessionSummary summary;
    {
      auto ctx = conn->Context();
      if (grpc::Status s = conn->Admin().GetSession(ctx.get(), get, &summary); !s.ok()) {
        return conn->Fail(s);
      }
    }
    const auto& ss = summary.session();
    std::string participants;
    for (const auto& p : ss.participants()) participants += (participants.empty() ? "" : ";") + p;
    sessions_csv +=
        CsvRow({ss.id(), ss.title(), ss.study(), ss.condition(), participants,
                std::to_string(ss.opened_session_ns()), std::to_string(ss.closed_session_ns()),
                std::to_string(ss.last_sequence())});
    v1::SubscribeRequest req;
    req.set_session_id(id);
    req.set_from_sequence(1);
    req.set_stop_at_end(true);
    for (const CsvTable& t : CsvTables()) req.add_kinds(t.kind);
    grpc::Status s = conn->ReadRecords(req, [&](const v1::Record& r) {
      const CsvTable* t = CsvTableFor(r);
      if (t == nullptr) return;
      files[t->file] << CsvRecordRow(*t, r);
      ++rows[t->file];
    });
    if (!s.ok()) return conn->Fail(s);
  }
  for (auto& [name, out] : files) {
    out.flush();
    if (!out) {
      std::cerr << "tickmark export: cannot write " << (dir / name).string() << "\n";
      return kExitError;
    }
  }
  std::string codebook = CsvCodebook();
  for (const auto& c : kSessionsCodebook) {
    codebook += CsvRow({"sessions.csv", c[0], c[1], c[2], c[3], c[4]});
  }
  std::string readme =
      "tickmark CSV export (docs/studies.md, \"Export for analysis\")\n\n"
      "codebook.csv describes every column of every file: file, column, type (integer = int64, "
      "number = float64, string, boolean = 0/1), unit (ns, ppm, s), clock and meaning.\n"
      "Clocks: \"session time\" is the server's monotonic clock anchored to UTC when the session "
      "opened, in nanoseconds since the Unix epoch; \"source clock\", \"agent clock\" and "
      "\"client clock\" are a device's own raw clock (not comparable across devices); an empty "
      "clock means the value is no time (durations in ns are plain counts).\n"
      "Files are RFC 4180 CSV (UTF-8, CRLF, header row). Read nanosecond columns as int64.\n\n"
      "Files:\n  sessions.csv: one row per exported session\n";
  for (const CsvTable& t : CsvTables()) {
    readme += "  " + t.file + ": " + t.meaning + " (" + std::to_string(rows[t.file]) + " rows)\n";
  }
  if (!write_file(dir / "sessions.csv", sessions_csv) ||
      !write_file(dir / "codebook.csv", codebook) || !write_file(dir / "README.txt", readme)) {
    return kExitError;
  }
  uint64_t total = 0;
  for (const auto& [name, n] : rows) total += n;
  std::cout << "exported " << total << " rows from " << sessions.size() << " session"
            << (sessions.size() == 1 ? "" : "s") << " to " << f.out_path
            << " (codebook.csv describes every column)\n";
  return kExitOk;
}

int RunExport(const CommonFlags& common, const ExportFlags& f) {
  v1::SubscribeRequest req;
  req.set_session_id(f.session);
  req.set_from_sequence(static_cast<uint64_t>(std::max<int64_t>(1, f.from)));
  req.set_stop_at_end(!f.follow);
  std::stringstream list(f.kinds);
  for (std::string k; std::getline(list, k, ',');) {
    if (k.empty()) continue;
    std::string upper = "RECORD_KIND_";
    for (char ch : k) upper += static_cast<char>(std::toupper(static_cast<unsigned char>(ch)));
    v1::RecordKind kind;
    if (!v1::RecordKind_Parse(upper, &kind)) {
      std::cerr << "tickmark: --kinds: unknown record kind '" << k << "'\n";
      return kExitUsage;
    }
    req.add_kinds(kind);
  }
  auto conn = Connection::Open(common);
  if (!conn) return kExitError;
  std::ofstream file;
  if (!f.out_path.empty()) {
    file.open(f.out_path, std::ios::trunc);
    if (!file) {
      std::cerr << "tickmark: cannot write " << f.out_path << "\n";
      return kExitError;
    }
  }
  std::ostream& out = f.out_path.empty() ? std::cout : file;
  uint64_t n = 0;
  auto last_report = std::chrono::steady_clock::now();
  // A progress line that rewrites itself only makes sense on a terminal.
  const bool progress = !f.out_path.empty() && isatty(2);
  grpc::Status s = conn->ReadRecords(req, [&](const v1::Record& r) {
    out << RecordToJsonLine(r) << "\n";
    ++n;
    if (progress &&
        std::chrono::steady_clock::now() - last_report > std::chrono::milliseconds(200)) {
      std::cerr << "\rexported " << n << " records (through #" << r.sequence() << ")" << std::flush;
      last_report = std::chrono::steady_clock::now();
    }
  });
  if (progress) std::cerr << "\r";
  out.flush();
  if (!s.ok()) return conn->Fail(s);
  if (!f.out_path.empty()) std::cerr << "exported " << n << " records to " << f.out_path << "\n";
  return kExitOk;
}

}  // namespace

void AddExportCommand(CommandTable& table) {
  auto f = std::make_shared<ExportFlags>();
  CLI::App* cmd = table.AddCommand(
      table.root(), "export",
      "Writes a session's records as JSON Lines (one object per record, in sequence order, "
      "every record with its session time), readable by pandas.read_json(path, lines=True); "
      "or, with --format csv, one CSV per record kind and a codebook (codebook.csv: every "
      "column's type, unit, clock and meaning) into a folder, for a session or a whole study.",
      [&table, f] {
        if (f->format == "csv") return RunCsv(table.common(), *f);
        if (f->session.empty() || !f->study.empty()) {
          std::cerr << "tickmark export: --format jsonl needs --session (--study is for csv)\n";
          return kExitUsage;
        }
        return RunExport(table.common(), *f);
      });
  cmd->add_option("--session", f->session, "session id");
  cmd->add_option("--study", f->study, "csv only: every session of this study (y-...)");
  cmd->add_option("--format", f->format, "jsonl (one file) or csv (a folder)")
      ->check(CLI::IsMember({"jsonl", "csv"}))
      ->capture_default_str();
  cmd->add_option("--out", f->out_path,
                  "jsonl: file to write (default: stdout); csv: folder to write (required)")
      ->type_name("PATH");
  cmd->add_option(
      "--kinds", f->kinds,
      "only these kinds, comma-separated: feedback, step, probe, clock_model, "
      "marker, client_event, session_event, credit, label, unmatched, kernel, sync_pulse");
  cmd->add_option("--from", f->from, "first sequence number")->check(CLI::NonNegativeNumber);
  cmd->add_flag("--follow", f->follow, "keep following live records until interrupted");
}

}  // namespace tickmark::cli

// tickmark export: a session's records as JSON Lines.
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <chrono>
#include <fstream>
#include <iostream>
#include <memory>
#include <sstream>

#include "clients/cli/commands.h"
#include "clients/cli/jsonl.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;

struct ExportFlags {
  std::string session;
  std::string out_path;
  std::string kinds;
  int64_t from = 1;
  bool follow = false;
};

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
  auto ctx = conn->StreamContext();
  auto stub = conn->Live();
  auto reader = stub.Subscribe(ctx.get(), req);
  v1::Record r;
  uint64_t n = 0;
  auto last_report = std::chrono::steady_clock::now();
  // A progress line that rewrites itself only makes sense on a terminal.
  const bool progress = !f.out_path.empty() && isatty(2);
  while (reader->Read(&r)) {
    out << RecordToJsonLine(r) << "\n";
    ++n;
    if (progress &&
        std::chrono::steady_clock::now() - last_report > std::chrono::milliseconds(200)) {
      std::cerr << "\rexported " << n << " records (through #" << r.sequence() << ")"
                << std::flush;
      last_report = std::chrono::steady_clock::now();
    }
  }
  if (progress) std::cerr << "\r";
  grpc::Status s = reader->Finish();
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
      "every record with its session time), readable by pandas.read_json(path, lines=True).",
      [&table, f] { return RunExport(table.common(), *f); });
  cmd->add_option("--session", f->session, "session id")->required();
  cmd->add_option("--out", f->out_path, "file to write (default: stdout)")->type_name("FILE");
  cmd->add_option("--kinds", f->kinds,
                  "only these kinds, comma-separated: feedback, step, probe, clock_model, "
                  "marker, client_event, session_event, credit, label, unmatched, kernel, sync_pulse");
  cmd->add_option("--from", f->from, "first sequence number")->check(CLI::NonNegativeNumber);
  cmd->add_flag("--follow", f->follow, "keep following live records until interrupted");
}

}  // namespace tickmark::cli

// tickmark audit verify|receipt, tickmark archive, tickmark study
// erase-participant (docs/audit.md). verify, archive and `receipt --ledger`
// read the ledger file directly and read-only (tickmark::audit), so they work
// on a copied file with no server running; erase-participant asks the server,
// which owns the file.
#include <filesystem>
#include <fstream>
#include <iostream>
#include <memory>
#include <sstream>
#include <string>

#include "clients/cli/commands.h"
#include "clients/cli/output.h"
#include "absl/strings/escaping.h"
#include "server/audit/archive.h"
#include "server/audit/chain_verifier.h"
#include "server/audit/receipt.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;
using Admin = v1::SessionAdmin::Stub;

// audit verify's exit codes (docs/audit.md, "Verify").
constexpr int kVerified = 0;
constexpr int kVerifyFailed = 1;  // a chain is broken or the receipt does not hold
constexpr int kCannotVerify = 3;  // no such file or session, not a ledger, bad receipt file

// The ledger a file-reading command works on: --ledger, else
// DATA_DIR/tickmark.db, else ./var/tickmark.db (where ./run server keeps it).
std::string LedgerPath(const std::string& ledger, const std::string& data_dir) {
  if (!ledger.empty()) return ledger;
  return (data_dir.empty() ? std::string("var") : data_dir) + "/tickmark.db";
}

bool ReadFile(const std::string& path, std::string* out) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return false;
  std::stringstream ss;
  ss << in.rdbuf();
  *out = ss.str();
  return true;
}

bool WriteFile(const std::string& path, const std::string& text) {
  std::ofstream out(path, std::ios::binary | std::ios::trunc);
  out << text;
  return static_cast<bool>(out.flush());
}

struct VerifyFlags {
  std::string ledger, data_dir, session, receipt, public_key;
};

int RunVerify(const VerifyFlags& f) {
  audit::VerifyOptions o;
  o.ledger_path = LedgerPath(f.ledger, f.data_dir);
  o.session = f.session;
  if (!f.receipt.empty()) {
    std::string text;
    if (!ReadFile(f.receipt, &text)) {
      std::cerr << "tickmark audit verify: cannot read receipt " << f.receipt << "\n";
      return kCannotVerify;
    }
    auto r = audit::ParseReceiptFile(text);
    if (!r.ok()) {
      std::cerr << "tickmark audit verify: " << f.receipt << ": " << r.status().message() << "\n";
      return kCannotVerify;
    }
    o.receipt = *r;
  }
  if (!f.public_key.empty() && !ReadFile(f.public_key, &o.public_key_pem)) {
    std::cerr << "tickmark audit verify: cannot read public key " << f.public_key << "\n";
    return kCannotVerify;
  }
  auto result = audit::VerifyLedgerFile(o);
  if (!result.ok()) {
    std::cerr << "tickmark audit verify: " << result.status().message() << "\n";
    return kCannotVerify;
  }
  std::cout << "ledger " << o.ledger_path << "\n";
  for (const audit::SessionVerdict& v : result->sessions) {
    std::cout << v.session_id << "  chain v" << v.chain_version << "  " << v.records
              << " records  ";
    if (v.ok) {
      std::cout << "OK";
      if (v.records > 0) std::cout << "  head " << absl::BytesToHexString(v.head_hash).substr(0, 16);
      if (v.personal_erased > 0) std::cout << "  " << v.personal_erased << " erased";
      std::cout << "  receipt " << v.stored_receipt << "\n";
    } else {
      std::cout << "BROKEN at record " << v.broken_sequence << ": " << v.problem << "\n";
    }
  }
  if (result->receipt_given) {
    std::cout << "receipt " << f.receipt << ": " << (result->receipt_ok ? "OK, " : "FAILED, ")
              << result->receipt_detail << "\n";
    std::cout << "public key from " << result->key_source << "\n";
  }
  if (result->sessions.empty()) std::cout << "(no sessions)\n";
  return result->ok() ? kVerified : kVerifyFailed;
}

void AddVerify(CommandTable& table, CLI::App* group) {
  auto f = std::make_shared<VerifyFlags>();
  CLI::App* cmd = table.AddCommand(
      group, "verify",
      "Recomputes every hash chain of a ledger file (read-only; works on a copy with no server "
      "running) and names the first broken record of each session. With --receipt, also proves "
      "that the session was not rewritten after the receipt was signed.\n"
      "Exit codes: 0 every check passed; 1 a chain is broken or the receipt does not hold; "
      "2 bad usage; 3 could not check (no such file or session, not a ledger, bad receipt).",
      [f] { return RunVerify(*f); });
  cmd->add_option("--ledger", f->ledger, "ledger file (default DATA_DIR/tickmark.db)");
  cmd->add_option("--data-dir", f->data_dir, "the server's data folder (default ./var)");
  cmd->add_option("--session", f->session, "verify only this session");
  cmd->add_option("--receipt", f->receipt, "a receipt file (tickmark audit receipt) to prove");
  cmd->add_option("--public-key", f->public_key,
                  "the server's receipt public key, PEM (default: receipt-key.pub.pem beside the "
                  "ledger)");
}

void PrintReceipt(const v1::Receipt& r, const std::string& out) {
  const std::string text = audit::ReceiptFileText(r);
  if (!out.empty()) {
    if (!WriteFile(out, text)) {
      std::cerr << "tickmark: cannot write " << out << "\n";
      return;
    }
    std::cout << "receipt written to " << out << "\n";
    return;
  }
  std::cout << text;
}

struct ReceiptFlags {
  std::string session, out, ledger, data_dir;
};

int RunReceipt(const CommonFlags& common, const ReceiptFlags& f) {
  if (!f.ledger.empty() || !f.data_dir.empty()) {
    auto stored = audit::ReadStoredReceipt(LedgerPath(f.ledger, f.data_dir), f.session);
    if (!stored.ok()) {
      std::cerr << "tickmark audit receipt: " << stored.status().message() << "\n";
      return kExitError;
    }
    PrintReceipt(stored->first, f.out);
    return kExitOk;
  }
  v1::GetSessionRequest req;
  req.set_session_id(f.session);
  return CallAdmin<v1::GetSessionRequest, v1::SessionSummary>(
      common, &Admin::GetSession, req, [&f](const v1::SessionSummary& s) {
        if (!s.has_receipt()) {
          std::cerr << "tickmark audit receipt: session " << f.session
                    << " has no receipt (it is open, or closed before receipts existed)\n";
          return kExitError;
        }
        PrintReceipt(s.receipt(), f.out);
        return kExitOk;
      });
}

void AddReceipt(CommandTable& table, CLI::App* group) {
  auto f = std::make_shared<ReceiptFlags>();
  CLI::App* cmd = table.AddCommand(
      group, "receipt",
      "Prints (or writes with --out) a closed session's signed receipt, from the server or, with "
      "--ledger/--data-dir, from the ledger file. docs/audit.md gives its exact bytes.",
      [&table, f] { return RunReceipt(table.common(), *f); });
  cmd->add_option("--session", f->session, "session id")->required();
  cmd->add_option("--out", f->out, "write the receipt to this file");
  cmd->add_option("--ledger", f->ledger, "read it from this ledger file instead of the server");
  cmd->add_option("--data-dir", f->data_dir, "read it from DATA_DIR/tickmark.db");
}

struct ArchiveFlags {
  std::string session, out, ledger, data_dir;
};

int RunArchive(const ArchiveFlags& f) {
  const std::string ledger = LedgerPath(f.ledger, f.data_dir);
  if (absl::Status s = audit::ArchiveSession(ledger, f.session, f.out); !s.ok()) {
    std::cerr << "tickmark archive: " << s.message() << "\n";
    return kExitError;
  }
  // The archive must stand on its own: verify it before saying it is done.
  audit::VerifyOptions o;
  o.ledger_path = f.out;
  auto result = audit::VerifyLedgerFile(o);
  if (!result.ok() || !result->ok() || result->sessions.size() != 1) {
    std::cerr << "tickmark archive: the archive " << f.out << " does not verify ("
              << (result.ok() ? "run tickmark audit verify --ledger on it"
                              : std::string(result.status().message()))
              << "); the source ledger may be damaged: run tickmark audit verify\n";
    return kExitError;
  }
  const audit::SessionVerdict& v = result->sessions.front();
  std::cout << "session " << f.session << " archived to " << f.out << " (" << v.records
            << " records, chain verified, receipt " << v.stored_receipt << ")\n";
  return kExitOk;
}

void AddArchive(CommandTable& table) {
  auto f = std::make_shared<ArchiveFlags>();
  CLI::App* cmd = table.AddCommand(
      table.root(), "archive",
      "Writes one session as a self-contained SQLite file (SQLite's online backup API, then every "
      "other session removed), which tickmark audit verify --ledger accepts on its own. Reads the "
      "ledger file directly (a running server may keep writing).",
      [f] { return RunArchive(*f); });
  cmd->add_option("--session", f->session, "session id")->required();
  cmd->add_option("--out", f->out, "the archive file to create (must not exist)")->required();
  cmd->add_option("--ledger", f->ledger, "ledger file (default DATA_DIR/tickmark.db)");
  cmd->add_option("--data-dir", f->data_dir, "the server's data folder (default ./var)");
}

void AddEraseParticipant(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::EraseParticipantRequest>();
  CLI::App* cmd = table.AddCommand(
      group, "erase-participant",
      "Erases a participant's personal content (feedback values and inputs, calibration answers, "
      "kept audio hashes) from every session, keeping every hash chain verifiable, and records "
      "the erasure. Sessions created before chain version 2 cannot be erased (listed). Needs the "
      "operator token; the participant's sessions must be closed. docs/audit.md says what stays.",
      [&table, req] {
        return CallAdmin<v1::EraseParticipantRequest, v1::EraseParticipantResponse>(
            table.common(), &Admin::EraseParticipant, *req,
            [req](const v1::EraseParticipantResponse& r) {
              for (const auto& s : r.sessions()) {
                std::cout << "session " << s.session_id() << ": " << s.records()
                          << " records erased (recorded as record " << s.erasure_sequence()
                          << ")\n";
              }
              for (const auto& s : r.version1_sessions()) {
                std::cout << "session " << s
                          << ": NOT erased (chain version 1: its records are hashed whole)\n";
              }
              if (r.sessions().empty() && r.version1_sessions().empty()) {
                std::cout << "nothing of " << req->participant() << " is kept\n";
              }
              return r.version1_sessions().empty() ? kExitOk : kExitError;
            });
      });
  cmd->add_option_function<std::string>(
         "PARTICIPANT", [req](const std::string& v) { req->set_participant(v); },
         "the trainer pseudonym")
      ->required();
  cmd->add_option_function<std::string>(
      "--reason", [req](const std::string& v) { req->set_reason(v); },
      "why (recorded with the erasure; no personal data)");
}

}  // namespace

int PrintReceiptOf(const CommonFlags& common, const std::string& session_id) {
  ReceiptFlags f;
  f.session = session_id;
  return RunReceipt(common, f);
}

void AddAuditCommands(CommandTable& table) {
  CLI::App* group = table.AddGroup("audit", "verify the ledger's hash chains and receipts");
  AddVerify(table, group);
  AddReceipt(table, group);
  AddArchive(table);
  AddEraseParticipant(table, table.AddGroup("study", "studies, conditions and participants"));
}

}  // namespace tickmark::cli

// tickmark calibrate new|list|show|plot|apply: a trainer's delay calibration
// (docs/calibration.md). `new` prepares a calibration run, `show` prints the
// fit table and can draw the fits (plot/calibration_plot.h), `apply` sets a
// trainer's kernel in a session to a calibration's.
#include <google/protobuf/util/json_util.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <fstream>
#include <iostream>
#include <memory>
#include <sstream>

#include "clients/cli/commands.h"
#include "clients/cli/output.h"
#include "clients/cli/plot/calibration_plot.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;
using Admin = v1::SessionAdmin::Stub;

std::string Fmt(const char* format, double v) {
  char buf[64];
  std::snprintf(buf, sizeof buf, format, v);
  return buf;
}

// "terminal" for SOURCE_KIND_TERMINAL; "-" when unspecified.
std::string SourceWord(v1::SourceKind kind) {
  if (kind == v1::SOURCE_KIND_UNSPECIFIED) return "-";
  std::string name = v1::SourceKind_Name(kind);
  const std::string prefix = "SOURCE_KIND_";
  if (name.rfind(prefix, 0) == 0) name = name.substr(prefix.size());
  for (char& ch : name) ch = ch == '_' ? '-' : static_cast<char>(std::tolower(ch));
  return name;
}

// Pads `s` to `width` display columns (UTF-8 aware for the few non-ASCII
// characters we print).
std::string Pad(const std::string& s, size_t width, bool right = false) {
  size_t cols = 0;
  for (unsigned char ch : s) cols += (ch & 0xC0) != 0x80;
  if (cols >= width) return s;
  const std::string fill(width - cols, ' ');
  return right ? fill + s : s + fill;
}

// Writes the calibration's plot to `path`; prints why on failure.
bool WritePlot(const v1::Calibration& cal, const std::string& path) {
  std::string note;
  const plot::Canvas canvas = plot::DrawCalibration(cal, &note);
  const std::string png = canvas.Png();
  std::ofstream out(path, std::ios::binary | std::ios::trunc);
  if (png.empty() || !out.write(png.data(), static_cast<std::streamsize>(png.size())) ||
      !out.flush()) {
    std::cerr << "tickmark: cannot write the plot to " << path << "\n";
    return false;
  }
  if (!note.empty()) std::cerr << "tickmark: " << note << "\n";
  std::cerr << "plot written to " << path << " (" << canvas.width() << "x" << canvas.height()
            << ")\n";
  return true;
}

std::string ToJson(const google::protobuf::Message& m) {
  std::string json;
  google::protobuf::util::JsonPrintOptions options;
  options.add_whitespace = true;
  options.preserve_proto_field_names = true;
  (void)google::protobuf::util::MessageToJsonString(m, &json, options);
  return json;
}

void PrintCalibration(const v1::Calibration& c) {
  std::cout << "calibration  " << c.id() << "\n"
            << "trainer      " << c.trainer() << "\n"
            << "source       " << SourceWord(c.source_kind())
            << (c.source_description().empty() ? "" : " (" + c.source_description() + ")") << "\n"
            << "client/run   " << (c.client_id().empty() ? "-" : c.client_id()) << " / "
            << (c.run().empty() ? "-" : c.run()) << "\n"
            << "answers      valid " << c.valid() << ", wrong sign " << c.wrong_sign()
            << ", double " << c.double_answers() << ", stray " << c.stray() << ", practice "
            << c.practice_answers() << ", missed " << c.missed() << " (of " << c.moves()
            << " moves; " << c.min_answers() << " valid wanted)\n"
            << "kernel       "
            << (c.kernel_description().empty() ? "-" : ShortKernelText(c.kernel_description()))
            << "\n";
  if (c.chosen() < static_cast<uint32_t>(c.fits_size())) {
    const auto& f = c.fits(static_cast<int>(c.chosen()));
    std::cout << "mean         " << Fmt("%.3f s", f.mean_s()) << "  (95% bootstrap "
              << Fmt("%.3f", c.mean_interval().low_s()) << " to "
              << Fmt("%.3f s)", c.mean_interval().high_s()) << "\n"
              << "p90          " << Fmt("%.3f s", f.p90_s()) << "  (95% bootstrap "
              << Fmt("%.3f", c.p90_interval().low_s()) << " to "
              << Fmt("%.3f s)", c.p90_interval().high_s()) << "\n";
  }
  std::cout << "display      " << (c.display_note().empty() ? "-" : c.display_note()) << "\n\n";

  // The fit table: chosen marked '*', ΔAIC against the chosen (lowest) AIC.
  double best = 0;
  if (c.chosen() < static_cast<uint32_t>(c.fits_size()))
    best = c.fits(static_cast<int>(c.chosen())).aic();
  std::cout << Pad("  FAMILY", 21) << Pad("K", 3, true) << Pad("LOG-LIK", 11, true)
            << Pad("AIC", 10, true) << Pad("ΔAIC", 8, true) << Pad("KS", 7, true)
            << Pad("MEAN s", 9, true) << Pad("P90 s", 8, true) << "  KERNEL\n";
  for (int i = 0; i < c.fits_size(); ++i) {
    const auto& f = c.fits(i);
    const std::string mark = static_cast<uint32_t>(i) == c.chosen() ? "* " : "  ";
    std::cout << Pad(mark + f.family(), 21) << Pad(std::to_string(f.parameters()), 3, true);
    if (!f.error().empty()) {
      std::cout << "  did not fit: " << f.error() << "\n";
      continue;
    }
    std::cout << Pad(Fmt("%.2f", f.log_likelihood()), 11, true)
              << Pad(Fmt("%.2f", f.aic()), 10, true) << Pad(Fmt("%.2f", f.aic() - best), 8, true)
              << Pad(Fmt("%.3f", f.ks_distance()), 7, true) << Pad(Fmt("%.3f", f.mean_s()), 9, true)
              << Pad(Fmt("%.3f", f.p90_s()), 8, true) << "  "
              << ShortKernelText(f.kernel_description()) << "\n";
  }
  std::cout << "(* chosen: lowest AIC; KS above " << Fmt("%.3g", c.ks_threshold())
            << " is called a poor fit)\n";
  if (c.warnings().empty()) {
    std::cout << "warnings     none\n";
  } else {
    for (const auto& w : c.warnings()) std::cout << "WARNING      " << w << "\n";
  }
}

void AddNew(CommandTable& table, CLI::App* group) {
  struct Flags {
    std::string trainer, title, token_out, admin_token_out;
  };
  auto f = std::make_shared<Flags>();
  CLI::App* cmd = table.AddCommand(
      group, "new",
      "Prepares a calibration run: opens a session for it, issues the trainer's token and "
      "prints the command that runs the task (operator token).",
      [&table, f] {
        auto conn = Connection::Open(table.common());
        if (!conn) return kExitError;
        auto stub = conn->Admin();
        v1::CreateSessionRequest create;
        create.set_title(f->title.empty() ? "calibration of " + f->trainer : f->title);
        create.set_study("calibration");
        v1::CreateSessionResponse session;
        auto ctx = conn->Context();
        if (auto s = stub.CreateSession(ctx.get(), create, &session); !s.ok()) return conn->Fail(s);
        v1::IssueTokenRequest issue;
        issue.set_session_id(session.session().id());
        issue.set_role(v1::ROLE_TRAINER);
        issue.set_subject(f->trainer);
        v1::IssueTokenResponse token;
        ctx = conn->Context();
        if (auto s = stub.IssueToken(ctx.get(), issue, &token); !s.ok()) {
          // Leave no empty calibration session behind (best effort).
          v1::CloseSessionRequest close;
          close.set_session_id(session.session().id());
          v1::Session closed;
          auto close_ctx = conn->Context();
          (void)stub.CloseSession(close_ctx.get(), close, &closed);
          return conn->Fail(s);
        }
        const std::string token_file =
            f->token_out.empty() ? f->trainer + ".calibration.token" : f->token_out;
        if (!WriteSecretFile(token_file, token.secret())) return kExitError;
        std::cout << "session " << session.session().id() << " opened for calibrating trainer "
                  << f->trainer << "\n"
                  << "trainer token " << token.token().token_id() << " written to " << token_file
                  << "\n";
        if (!f->admin_token_out.empty()) {
          if (!WriteSecretFile(f->admin_token_out, session.admin_secret())) return kExitError;
          std::cout << "admin token " << session.admin_token().token_id() << " written to "
                    << f->admin_token_out << "\n";
        }
        std::cout << "run the task (about two minutes) on the trainer's own screen and keys:\n"
                  << "  tickmark-keys --calibrate --token-file " << token_file << " --server "
                  << table.common().connection.channel.target << "\n"
                  << "  (a serial response box: tickmark-serial --calibrate, same token)\n"
                  << "then see the fit:\n"
                  << "  tickmark calibrate show --trainer " << f->trainer << " --plot "
                  << f->trainer << "-calibration.png\n";
        return kExitOk;
      });
  cmd->add_option("--trainer", f->trainer, "trainer pseudonym (not a real name)")->required();
  cmd->add_option("--title", f->title, "the session's title (default: calibration of TRAINER)");
  cmd->add_option("--token-out", f->token_out,
                  "write the trainer token here (0600; default TRAINER.calibration.token)")
      ->type_name("FILE");
  cmd->add_option("--admin-token-out", f->admin_token_out,
                  "also write the calibration session's admin token here (0600)")
      ->type_name("FILE");
}

void AddCalibrationList(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::ListCalibrationsRequest>();
  CLI::App* cmd =
      table.AddCommand(group, "list", "Lists calibrations, newest first.", [&table, req] {
        return CallAdmin<v1::ListCalibrationsRequest, v1::ListCalibrationsResponse>(
            table.common(), &Admin::ListCalibrations, *req,
            [](const v1::ListCalibrationsResponse& r) {
              std::cout << Pad("CALIBRATION", 13) << Pad("TRAINER", 16) << Pad("CREATED", 28)
                        << Pad("FAMILY", 19) << Pad("VALID", 6, true) << "  " << Pad("WARN", 6)
                        << "KERNEL\n";
              for (const auto& c : r.calibrations()) {
                std::cout << Pad(c.id(), 13) << Pad(c.trainer(), 16)
                          << Pad(FormatUtc(c.created_session_ns()), 28) << Pad(c.family(), 19)
                          << Pad(std::to_string(c.valid()), 6, true) << "  "
                          << Pad(c.warning() ? "yes" : "-", 6)
                          << ShortKernelText(c.kernel_description()) << "\n";
              }
              if (r.calibrations().empty()) std::cout << "(no calibrations)\n";
              return kExitOk;
            });
      });
  cmd->add_option_function<std::string>(
      "--trainer", [req](const std::string& v) { req->set_trainer(v); },
      "only this trainer's calibrations");
}

void AddCalibrationShow(CommandTable& table, CLI::App* group) {
  struct Flags {
    v1::GetCalibrationRequest req;
    std::string plot;
    bool json = false;
  };
  auto f = std::make_shared<Flags>();
  CLI::App* cmd = table.AddCommand(
      group, "show",
      "Shows a calibration: every family fitted, the answer counts, bootstrap intervals and "
      "warnings; --plot draws the delays and the fits.",
      [&table, f] {
        if (f->req.id().empty() == f->req.trainer().empty()) {
          std::cerr << "tickmark calibrate show: give a calibration ID or --trainer NAME (one of "
                       "them)\n";
          return kExitUsage;
        }
        return CallAdmin<v1::GetCalibrationRequest, v1::Calibration>(
            table.common(), &Admin::GetCalibration, f->req, [f](const v1::Calibration& c) {
              if (f->json) {
                std::cout << ToJson(c);
              } else {
                PrintCalibration(c);
              }
              if (!f->plot.empty() && !WritePlot(c, f->plot)) return kExitError;
              return kExitOk;
            });
      });
  cmd->add_option_function<std::string>(
      "ID", [f](const std::string& v) { f->req.set_id(v); }, "calibration id (c-...)");
  cmd->add_option_function<std::string>(
      "--trainer", [f](const std::string& v) { f->req.set_trainer(v); },
      "this trainer's latest calibration (instead of an ID)");
  cmd->add_option("--plot", f->plot,
                  "write a PNG: histogram of the valid delays with every fitted density")
      ->type_name("FILE.png");
  cmd->add_flag("--json", f->json, "print the whole calibration as JSON (proto field names)");
}

void AddPlot(CommandTable& table, CLI::App* group) {
  struct Flags {
    std::string in, out;
  };
  auto f = std::make_shared<Flags>();
  CLI::App* cmd = table.AddCommand(
      group, "plot", "Draws a calibration saved with 'calibrate show --json' (no server needed).",
      [f] {
        std::ifstream in(f->in);
        std::stringstream text;
        text << in.rdbuf();
        if (!in) {
          std::cerr << "tickmark: cannot read " << f->in << "\n";
          return kExitUsage;
        }
        v1::Calibration cal;
        google::protobuf::util::JsonParseOptions options;
        options.ignore_unknown_fields = true;
        if (auto s = google::protobuf::util::JsonStringToMessage(text.str(), &cal, options);
            !s.ok()) {
          std::cerr << "tickmark: " << f->in << " is not a calibration in JSON: " << s.ToString()
                    << "\n";
          return kExitUsage;
        }
        return WritePlot(cal, f->out) ? kExitOk : kExitError;
      });
  cmd->add_option("FILE.json", f->in, "a calibration from 'calibrate show --json'")->required();
  cmd->add_option("--out", f->out, "the PNG to write")->required()->type_name("FILE.png");
}

void AddApply(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::ApplyCalibrationRequest>();
  req->set_weight(1.0);
  CLI::App* cmd = table.AddCommand(
      group, "apply",
      "Sets the calibration's trainer's kernel in a session to the calibrated one (recorded in "
      "the ledger, naming the calibration).",
      [&table, req] {
        return CallAdmin<v1::ApplyCalibrationRequest, v1::SetKernelResponse>(
            table.common(), &Admin::ApplyCalibration, *req, [](const v1::SetKernelResponse& r) {
              std::cout << "trainer " << r.setting().trainer() << ": " << r.setting().description()
                        << ", weight " << r.setting().weight() << ", from calibration "
                        << (r.setting().calibration().empty() ? "-" : r.setting().calibration())
                        << " (record #" << r.sequence() << ")\n";
              return kExitOk;
            });
      });
  cmd->add_option_function<std::string>(
         "ID", [req](const std::string& v) { req->set_calibration_id(v); }, "calibration id")
      ->required();
  cmd->add_option_function<std::string>(
         "--session", [req](const std::string& v) { req->set_session_id(v); }, "session id")
      ->required();
  cmd->add_option_function<double>(
         "--weight", [req](const double& v) { req->set_weight(v); },
         "the trainer's weight in labels (>= 0)")
      ->default_str("1")
      ->check(CLI::Range(0.0, 1e9));
}

}  // namespace

void AddCalibrateCommands(CommandTable& table) {
  CLI::App* group =
      table.AddGroup("calibrate", "measure a trainer's reaction delays and fit their delay kernel");
  AddNew(table, group);
  AddCalibrationList(table, group);
  AddCalibrationShow(table, group);
  AddPlot(table, group);
  AddApply(table, group);
}

}  // namespace tickmark::cli

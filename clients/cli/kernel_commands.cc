// tickmark kernel set|load.
#include <iostream>
#include <memory>
#include <vector>

#include <toml++/toml.h>

#include "clients/cli/commands.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;

void PrintSetting(const v1::SetKernelResponse& r) {
  std::cout << "trainer " << r.setting().trainer() << ": " << r.setting().description()
            << ", weight " << r.setting().weight();
}

void AddSet(CommandTable& table, CLI::App* group) {
  auto req = std::make_shared<v1::SetKernelRequest>();
  req->set_weight(1.0);
  CLI::App* cmd = table.AddCommand(
      group, "set",
      "Sets a trainer's delay kernel and weight from now on (recorded in the ledger).",
      [&table, req] {
        return CallAdmin<v1::SetKernelRequest, v1::SetKernelResponse>(
            table.common(), &v1::SessionAdmin::Stub::SetKernel, *req,
            [](const v1::SetKernelResponse& r) {
              PrintSetting(r);
              std::cout << " (record #" << r.sequence() << ")\n";
              return kExitOk;
            });
      });
  cmd->footer(
      "KERNEL: uniform:MIN,MAX  gamma:SHAPE,SCALE[,SHIFT]  exponential:RATE[,SHIFT]\n"
      "        empirical:EDGE,WIDTH,C0,C1,...   (times in seconds)");
  cmd->add_option_function<std::string>(
         "--session", [req](const std::string& v) { req->set_session_id(v); }, "session id")
      ->required();
  cmd->add_option_function<std::string>(
      "--trainer", [req](const std::string& v) { req->set_trainer(v); }, "trainer pseudonym");
  cmd->add_option_function<double>(
         "--weight", [req](const double& v) { req->set_weight(v); },
         "the trainer's weight in labels")
      ->default_str("1");
  cmd->add_option_function<std::string>(
         "KERNEL", [req](const std::string& v) { req->set_kernel(v); },
         "the delay kernel (see below)")
      ->required();
}

// Reads [trainers.NAME] kernel = "...", weight = W into requests; prints
// why and returns false for a file that does not fit.
bool ReadKernelFile(const std::string& path, const std::string& session,
                    std::vector<v1::SetKernelRequest>* requests) {
  toml::table file;
  try {
    file = toml::parse_file(path);
  } catch (const toml::parse_error& e) {
    std::cerr << "tickmark: " << path << ":" << e.source().begin.line << ": " << e.description()
              << "\n";
    return false;
  }
  const toml::table* trainers = file["trainers"].as_table();
  if (trainers == nullptr || trainers->empty()) {
    std::cerr << "tickmark: " << path << " has no [trainers.NAME] tables\n";
    return false;
  }
  for (const auto& [name, node] : *trainers) {
    const toml::table* t = node.as_table();
    auto kernel = t ? (*t)["kernel"].value<std::string>() : std::nullopt;
    if (!kernel) {
      std::cerr << "tickmark: [trainers." << name.str() << "] needs kernel = \"...\"\n";
      return false;
    }
    for (const auto& [key, unused] : *t) {
      if (key.str() != "kernel" && key.str() != "weight") {
        std::cerr << "tickmark: [trainers." << name.str() << "]: unknown key '" << key.str()
                  << "' (kernel, weight)\n";
        return false;
      }
    }
    v1::SetKernelRequest req;
    req.set_session_id(session);
    req.set_trainer(std::string(name.str()));
    req.set_kernel(*kernel);
    req.set_weight((*t)["weight"].value<double>().value_or(1.0));
    requests->push_back(std::move(req));
  }
  return true;
}

void AddLoad(CommandTable& table, CLI::App* group) {
  struct Flags {
    std::string session;
    std::string file;
  };
  auto flags = std::make_shared<Flags>();
  CLI::App* cmd = table.AddCommand(
      group, "load", "Sets trainers' delay kernels and weights from a TOML file.",
      [&table, flags] {
        std::vector<v1::SetKernelRequest> requests;
        if (!ReadKernelFile(flags->file, flags->session, &requests)) return kExitUsage;
        auto conn = Connection::Open(table.common());
        if (!conn) return kExitError;
        for (const auto& req : requests) {
          v1::SetKernelResponse resp;
          auto ctx = conn->Context();
          if (auto s = conn->Admin().SetKernel(ctx.get(), req, &resp); !s.ok()) {
            std::cerr << "tickmark: trainer " << req.trainer() << ": ";
            return conn->Fail(s);
          }
          PrintSetting(resp);
          std::cout << "\n";
        }
        return kExitOk;
      });
  cmd->footer(
      "FILE:\n"
      "  [trainers.trainer-07]\n"
      "  kernel = \"gamma:2,0.3\"\n"
      "  weight = 1.0\n"
      "Each entry is recorded in the ledger as if set with 'kernel set'.");
  cmd->add_option("--session", flags->session, "session id")->required();
  cmd->add_option("FILE", flags->file, "TOML file of trainers' kernels")->required();
}

}  // namespace

void AddKernelCommands(CommandTable& table) {
  CLI::App* group = table.AddGroup("kernel", "set trainers' delay kernels and weights");
  AddSet(table, group);
  AddLoad(table, group);
}

}  // namespace tickmark::cli

// tickmark: the operator's command line. Talks to tickmarkd over gRPC
// (SessionAdmin, Live.Subscribe); main() dispatches "GROUP VERB" to one
// function per command.
#include <sys/stat.h>

#include <chrono>
#include <cstdlib>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <iomanip>
#include <iostream>
#include <map>
#include <optional>
#include <unistd.h>
#include <sstream>

#include <grpcpp/grpcpp.h>
#include <toml++/toml.h>

#include "clients/cli/jsonl.h"
#include "clients/common/channel.h"
#include "clients/common/token.h"
#include "server/base/flags.h"
#include "tickmark/v1/admin.grpc.pb.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;

constexpr int kExitOk = 0;
constexpr int kExitError = 1;
constexpr int kExitUsage = 2;

constexpr char kSafety[] =
    "Safety: tickmark is not a safety system. A robot trained or driven with it needs an\n"
    "independent emergency stop; studies with people need approval from your ethics board\n"
    "and participant data protection under local rules.";

constexpr char kOverview[] =
    "usage: tickmark COMMAND [flags]\n"
    "\n"
    "The operator's tool for a tickmark server.\n"
    "\n"
    "commands:\n"
    "  session create --title T [--study S] [--kernel K]\n"
    "                                         open a session; prints its id and admin token\n"
    "  session list [--all]                   sessions with their counts\n"
    "  session show ID                        one session in detail\n"
    "  session close ID                       end a session (streams end, nothing more is taken)\n"
    "  token issue --session ID --role R [--subject NAME] [--out FILE]\n"
    "                                         a token for a trainer, agent, observer or admin\n"
    "  token list --session ID                the session's tokens (never their secrets)\n"
    "  token revoke --session ID TOKEN_ID     revoke a token; its streams end\n"
    "  marker add --session ID TEXT           put a marker on the session timeline now\n"
    "  kernel set --session ID --trainer T KERNEL [--weight W]\n"
    "                                         a trainer's delay kernel (gamma:2,0.28, ...)\n"
    "  kernel load --session ID FILE          trainers' kernels and weights from a TOML file\n"
    "  replay --session ID --name N [--kernel K]\n"
    "                                         recompute labels with other kernels; compare\n"
    "  export --session ID [--out FILE] [--kinds K,..]\n"
    "                                         the session's records as JSON Lines\n"
    "\n"
    "Every command takes --server HOST:PORT (default $TICKMARK_SERVER or 127.0.0.1:7461),\n"
    "--token-file PATH (default $TICKMARK_TOKEN, else ./var/operator.token), --ca-file PATH\n"
    "and --insecure. 'tickmark COMMAND --help' shows a command's flags.\n"
    "\n";

// Flags every command shares, and the connection they describe.
struct Common {
  std::string server;
  std::string token_file;
  std::string token;
  std::string ca_file;
  bool insecure = false;
  int64_t timeout_s = 30;

  void Register(FlagSet& flags) {
    const char* env = std::getenv("TICKMARK_SERVER");
    server = env ? env : "127.0.0.1:7461";
    flags.String("server", &server, "tickmarkd address");
    flags.String("token-file", &token_file, "file holding the token to use");
    flags.String("token", &token, "the token itself (visible in ps; prefer --token-file)");
    flags.String("ca-file", &ca_file, "PEM roots to trust for TLS");
    flags.Bool("insecure", &insecure, "plaintext to a non-loopback server");
    flags.Int("timeout", &timeout_s, "seconds to wait for the server");
  }
};

class Connection {
 public:
  static std::optional<Connection> Open(const Common& c) {
    client::ChannelFlags cf;
    cf.target = c.server;
    cf.insecure = c.insecure;
    cf.ca_file = c.ca_file;
    auto creds = client::ChooseCredentials(cf);
    if (!creds.ok()) {
      std::cerr << "tickmark: " << creds.status().message() << "\n";
      return std::nullopt;
    }
    client::TokenFlags tf{c.token_file, c.token};
    auto token = client::ReadToken(tf);
    if (!token.ok() && absl::IsNotFound(token.status()) &&
        std::filesystem::exists("var/operator.token")) {
      tf.token_file = "var/operator.token";
      token = client::ReadToken(tf);
    }
    if (!token.ok()) {
      std::cerr << "tickmark: no token: " << token.status().message()
                << "\n  (give --token-file, set TICKMARK_TOKEN, or run from the folder whose "
                   "var/operator.token tickmarkd wrote)\n";
      return std::nullopt;
    }
    for (const auto& w : token->warnings) std::cerr << "tickmark: warning: " << w << "\n";
    Connection conn;
    conn.channel_ = grpc::CreateChannel(c.server, creds->credentials);
    conn.token_ = token->value;
    conn.timeout_ = std::chrono::seconds(c.timeout_s);
    conn.server_ = c.server;
    return conn;
  }

  std::unique_ptr<grpc::ClientContext> Context() const {
    auto ctx = std::make_unique<grpc::ClientContext>();
    ctx->AddMetadata("authorization", "Bearer " + token_);
    ctx->set_deadline(std::chrono::system_clock::now() + timeout_);
    return ctx;
  }
  std::unique_ptr<grpc::ClientContext> StreamContext() const {
    auto ctx = std::make_unique<grpc::ClientContext>();
    ctx->AddMetadata("authorization", "Bearer " + token_);
    return ctx;
  }
  v1::SessionAdmin::Stub Admin() const { return v1::SessionAdmin::Stub(channel_); }
  v1::Live::Stub Live() const { return v1::Live::Stub(channel_); }
  const std::string& server() const { return server_; }

 private:
  std::shared_ptr<grpc::Channel> channel_;
  std::string token_;
  std::chrono::seconds timeout_{30};
  std::string server_;
};

int Fail(const Connection& conn, const grpc::Status& s) {
  std::cerr << "tickmark: ";
  switch (s.error_code()) {
    case grpc::StatusCode::UNAVAILABLE:
      std::cerr << "cannot reach tickmarkd at " << conn.server() << " (" << s.error_message()
                << ")\n  is the server running? ('./run server' starts one)\n";
      break;
    case grpc::StatusCode::UNAUTHENTICATED:
      std::cerr << "not authenticated: " << s.error_message() << "\n";
      break;
    case grpc::StatusCode::PERMISSION_DENIED:
      std::cerr << "not allowed: " << s.error_message() << "\n";
      break;
    case grpc::StatusCode::NOT_FOUND:
      std::cerr << "not found: " << s.error_message() << "\n";
      break;
    default:
      std::cerr << s.error_message() << " (gRPC code " << s.error_code() << ")\n";
  }
  return kExitError;
}

std::string Utc(int64_t ns) {
  if (ns == 0) return "-";
  std::time_t secs = static_cast<std::time_t>(ns / 1'000'000'000);
  std::tm tm{};
  gmtime_r(&secs, &tm);
  char buf[40];
  std::strftime(buf, sizeof buf, "%Y-%m-%d %H:%M:%S", &tm);
  char ms[8];
  std::snprintf(ms, sizeof ms, ".%03d", static_cast<int>((ns / 1'000'000) % 1000));
  return std::string(buf) + ms + " UTC";
}

std::string RoleName(v1::Role r) {
  switch (r) {
    case v1::ROLE_ADMIN: return "admin";
    case v1::ROLE_TRAINER: return "trainer";
    case v1::ROLE_AGENT: return "agent";
    case v1::ROLE_OBSERVER: return "observer";
    default: return "?";
  }
}

std::optional<v1::Role> ParseRole(const std::string& s) {
  if (s == "admin") return v1::ROLE_ADMIN;
  if (s == "trainer") return v1::ROLE_TRAINER;
  if (s == "agent") return v1::ROLE_AGENT;
  if (s == "observer") return v1::ROLE_OBSERVER;
  return std::nullopt;
}

// Writes a secret to a new file only its owner can read.
bool WriteSecret(const std::string& path, const std::string& secret) {
  std::ofstream out(path, std::ios::trunc);
  out << secret << "\n";
  out.close();
  if (!out) {
    std::cerr << "tickmark: cannot write " << path << "\n";
    return false;
  }
  ::chmod(path.c_str(), 0600);
  return true;
}

// Parses flags for one command; returns an exit code to stop with, or -1.
int ParseOrExit(FlagSet& flags, int argc, char** argv, int first, size_t want_args) {
  auto r = flags.Parse(argc, argv, first);
  if (r == FlagSet::kHelp) return kExitOk;
  if (r == FlagSet::kError) return kExitUsage;
  if (flags.args().size() != want_args) {
    std::cerr << flags.Usage();
    return kExitUsage;
  }
  return -1;
}

int SessionCreate(int argc, char** argv) {
  Common c;
  std::string title, study, token_out, kernel;
  FlagSet flags("tickmark session create", "Opens a session and prints its admin token.");
  c.Register(flags);
  flags.String("title", &title, "what the session is (\"dock rover, pilot 3\")");
  flags.String("study", &study, "study the session belongs to");
  flags.String("kernel", &kernel,
               "default delay kernel, e.g. uniform:0.2,4.0 or gamma:2,0.28 (seconds); "
               "default: the server's");
  flags.String("token-out", &token_out, "write the session's admin token to this file (0600)");
  if (int e = ParseOrExit(flags, argc, argv, 3, 0); e >= 0) return e;
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  v1::CreateSessionRequest req;
  req.set_title(title);
  req.set_study(study);
  req.set_default_kernel(kernel);
  v1::CreateSessionResponse resp;
  auto ctx = conn->Context();
  if (auto s = conn->Admin().CreateSession(ctx.get(), req, &resp); !s.ok()) return Fail(*conn, s);
  std::cout << "session " << resp.session().id() << " opened at "
            << Utc(resp.session().opened_session_ns()) << "\n";
  if (!token_out.empty()) {
    if (!WriteSecret(token_out, resp.admin_secret())) return kExitError;
    std::cout << "admin token " << resp.admin_token().token_id() << " written to " << token_out
              << "\n";
  } else {
    std::cout << "admin token " << resp.admin_token().token_id() << ": " << resp.admin_secret()
              << "\n(shown once; keep it secret)\n";
  }
  return kExitOk;
}

void PrintSummaryLine(const v1::SessionSummary& s) {
  std::cout << std::left << std::setw(12) << s.session().id() << std::setw(8)
            << (s.session().state() == v1::SESSION_STATE_OPEN ? "open" : "closed")
            << std::setw(28) << Utc(s.session().opened_session_ns()) << std::right
            << std::setw(9) << s.feedback_count() << std::setw(9) << s.step_count()
            << std::setw(7) << s.connected_clients() << "  " << s.session().title() << "\n";
}

int SessionList(int argc, char** argv) {
  Common c;
  bool all = false;
  FlagSet flags("tickmark session list", "Lists sessions (open ones unless --all).");
  c.Register(flags);
  flags.Bool("all", &all, "include closed sessions");
  if (int e = ParseOrExit(flags, argc, argv, 3, 0); e >= 0) return e;
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  v1::ListSessionsRequest req;
  req.set_include_closed(all);
  v1::ListSessionsResponse resp;
  auto ctx = conn->Context();
  if (auto s = conn->Admin().ListSessions(ctx.get(), req, &resp); !s.ok()) return Fail(*conn, s);
  std::cout << std::left << std::setw(12) << "SESSION" << std::setw(8) << "STATE" << std::setw(28)
            << "OPENED" << std::right << std::setw(9) << "FEEDBACK" << std::setw(9) << "STEPS"
            << std::setw(7) << "LIVE" << "  TITLE\n";
  for (const auto& s : resp.sessions()) PrintSummaryLine(s);
  if (resp.sessions().empty()) std::cout << "(no sessions" << (all ? ")" : " open; --all shows closed ones)") << "\n";
  return kExitOk;
}

int SessionShow(int argc, char** argv) {
  Common c;
  FlagSet flags("tickmark session show ID", "Shows one session with its counts.");
  c.Register(flags);
  if (int e = ParseOrExit(flags, argc, argv, 3, 1); e >= 0) return e;
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  v1::GetSessionRequest req;
  req.set_session_id(flags.args()[0]);
  v1::SessionSummary resp;
  auto ctx = conn->Context();
  if (auto s = conn->Admin().GetSession(ctx.get(), req, &resp); !s.ok()) return Fail(*conn, s);
  const auto& ss = resp.session();
  std::cout << "session    " << ss.id() << "\n"
            << "title      " << ss.title() << "\n"
            << "study      " << (ss.study().empty() ? "-" : ss.study()) << "\n"
            << "state      " << (ss.state() == v1::SESSION_STATE_OPEN ? "open" : "closed") << "\n"
            << "opened     " << Utc(ss.opened_session_ns()) << "\n"
            << "closed     " << Utc(ss.closed_session_ns()) << "\n"
            << "records    " << ss.last_sequence() << "\n"
            << "feedback   " << resp.feedback_count() << "\n"
            << "steps      " << resp.step_count() << "\n"
            << "probes     " << resp.probe_count() << " (" << resp.rejected_probe_count()
            << " rejected)\n"
            << "markers    " << resp.marker_count() << "\n"
            << "clients    " << resp.client_count() << " (" << resp.connected_clients()
            << " connected now)\n"
            << "late       " << resp.late_count() << "\n"
            << "unmatched  " << resp.unmatched_count() << "\n";
  return kExitOk;
}

int SessionClose(int argc, char** argv) {
  Common c;
  FlagSet flags("tickmark session close ID",
                "Closes a session: its streams end and no record is taken after.");
  c.Register(flags);
  if (int e = ParseOrExit(flags, argc, argv, 3, 1); e >= 0) return e;
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  v1::CloseSessionRequest req;
  req.set_session_id(flags.args()[0]);
  v1::Session resp;
  auto ctx = conn->Context();
  if (auto s = conn->Admin().CloseSession(ctx.get(), req, &resp); !s.ok()) return Fail(*conn, s);
  std::cout << "session " << resp.id() << " closed at " << Utc(resp.closed_session_ns()) << " ("
            << resp.last_sequence() << " records)\n";
  return kExitOk;
}

int TokenIssue(int argc, char** argv) {
  Common c;
  std::string session, role, subject, out;
  FlagSet flags("tickmark token issue",
                "Issues a token. Trainer tokens name a pseudonym, agent tokens an agent name.");
  c.Register(flags);
  flags.String("session", &session, "session id");
  flags.String("role", &role, "trainer, agent, observer or admin");
  flags.String("subject", &subject, "trainer pseudonym or agent name (not a real name)");
  flags.String("out", &out, "write the secret to this file (0600) instead of stdout");
  if (int e = ParseOrExit(flags, argc, argv, 3, 0); e >= 0) return e;
  auto r = ParseRole(role);
  if (session.empty() || !r) {
    std::cerr << "tickmark: --session and --role (trainer, agent, observer, admin) are required\n";
    return kExitUsage;
  }
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  v1::IssueTokenRequest req;
  req.set_session_id(session);
  req.set_role(*r);
  req.set_subject(subject);
  v1::IssueTokenResponse resp;
  auto ctx = conn->Context();
  if (auto s = conn->Admin().IssueToken(ctx.get(), req, &resp); !s.ok()) return Fail(*conn, s);
  if (!out.empty()) {
    if (!WriteSecret(out, resp.secret())) return kExitError;
    std::cerr << "token " << resp.token().token_id() << " (" << role
              << (subject.empty() ? "" : " " + subject) << ") written to " << out << "\n";
  } else {
    std::cerr << "token " << resp.token().token_id() << " (" << role
              << (subject.empty() ? "" : " " + subject) << "); the secret follows, shown once:\n";
    std::cout << resp.secret() << "\n";
  }
  return kExitOk;
}

int TokenList(int argc, char** argv) {
  Common c;
  std::string session;
  FlagSet flags("tickmark token list", "Lists a session's tokens (never their secrets).");
  c.Register(flags);
  flags.String("session", &session, "session id");
  if (int e = ParseOrExit(flags, argc, argv, 3, 0); e >= 0) return e;
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  v1::ListTokensRequest req;
  req.set_session_id(session);
  v1::ListTokensResponse resp;
  auto ctx = conn->Context();
  if (auto s = conn->Admin().ListTokens(ctx.get(), req, &resp); !s.ok()) return Fail(*conn, s);
  std::cout << std::left << std::setw(13) << "TOKEN" << std::setw(10) << "ROLE" << std::setw(20)
            << "SUBJECT" << std::setw(9) << "STATE" << "ISSUED\n";
  for (const auto& t : resp.tokens()) {
    std::cout << std::left << std::setw(13) << t.token_id() << std::setw(10) << RoleName(t.role())
              << std::setw(20) << (t.subject().empty() ? "-" : t.subject()) << std::setw(9)
              << (t.revoked() ? "revoked" : "active") << Utc(t.issued_session_ns()) << "\n";
  }
  return kExitOk;
}

int TokenRevoke(int argc, char** argv) {
  Common c;
  std::string session;
  FlagSet flags("tickmark token revoke TOKEN_ID", "Revokes a token; streams using it end.");
  c.Register(flags);
  flags.String("session", &session, "session id");
  if (int e = ParseOrExit(flags, argc, argv, 3, 1); e >= 0) return e;
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  v1::RevokeTokenRequest req;
  req.set_session_id(session);
  req.set_token_id(flags.args()[0]);
  v1::RevokeTokenResponse resp;
  auto ctx = conn->Context();
  if (auto s = conn->Admin().RevokeToken(ctx.get(), req, &resp); !s.ok()) return Fail(*conn, s);
  std::cout << "token " << resp.token().token_id() << " revoked\n";
  return kExitOk;
}

int MarkerAdd(int argc, char** argv) {
  Common c;
  std::string session;
  FlagSet flags("tickmark marker add TEXT", "Puts a marker on the session timeline now.");
  c.Register(flags);
  flags.String("session", &session, "session id");
  if (int e = ParseOrExit(flags, argc, argv, 3, 1); e >= 0) return e;
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  v1::AddMarkerRequest req;
  req.set_session_id(session);
  req.set_text(flags.args()[0]);
  v1::AddMarkerResponse resp;
  auto ctx = conn->Context();
  if (auto s = conn->Admin().AddMarker(ctx.get(), req, &resp); !s.ok()) return Fail(*conn, s);
  std::cout << "marker #" << resp.sequence() << " at " << Utc(resp.marker().at_session_ns())
            << "\n";
  return kExitOk;
}

int KernelSet(int argc, char** argv) {
  Common c;
  std::string session, trainer;
  double weight = 1.0;
  FlagSet flags("tickmark kernel set KERNEL",
                "Sets a trainer's delay kernel and weight from now on (recorded in the ledger).\n"
                "KERNEL: uniform:MIN,MAX  gamma:SHAPE,SCALE[,SHIFT]  exponential:RATE[,SHIFT]\n"
                "        empirical:EDGE,WIDTH,C0,C1,...   (times in seconds)");
  c.Register(flags);
  flags.String("session", &session, "session id");
  flags.String("trainer", &trainer, "trainer pseudonym");
  flags.Double("weight", &weight, "the trainer's weight in labels");
  if (int e = ParseOrExit(flags, argc, argv, 3, 1); e >= 0) return e;
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  v1::SetKernelRequest req;
  req.set_session_id(session);
  req.set_trainer(trainer);
  req.set_kernel(flags.args()[0]);
  req.set_weight(weight);
  v1::SetKernelResponse resp;
  auto ctx = conn->Context();
  if (auto s = conn->Admin().SetKernel(ctx.get(), req, &resp); !s.ok()) return Fail(*conn, s);
  std::cout << "trainer " << resp.setting().trainer() << ": " << resp.setting().description()
            << ", weight " << resp.setting().weight() << " (record #" << resp.sequence() << ")\n";
  return kExitOk;
}

int KernelLoad(int argc, char** argv) {
  Common c;
  std::string session;
  FlagSet flags("tickmark kernel load FILE",
                "Sets trainers' delay kernels and weights from a TOML file:\n"
                "  [trainers.trainer-07]\n"
                "  kernel = \"gamma:2,0.3\"\n"
                "  weight = 1.0\n"
                "Each entry is recorded in the ledger as if set with 'kernel set'.");
  c.Register(flags);
  flags.String("session", &session, "session id");
  if (int e = ParseOrExit(flags, argc, argv, 3, 1); e >= 0) return e;
  toml::table file;
  try {
    file = toml::parse_file(flags.args()[0]);
  } catch (const toml::parse_error& e) {
    std::cerr << "tickmark: " << flags.args()[0] << ":" << e.source().begin.line << ": "
              << e.description() << "\n";
    return kExitUsage;
  }
  const toml::table* trainers = file["trainers"].as_table();
  if (trainers == nullptr || trainers->empty()) {
    std::cerr << "tickmark: " << flags.args()[0] << " has no [trainers.NAME] tables\n";
    return kExitUsage;
  }
  std::vector<v1::SetKernelRequest> requests;
  for (const auto& [name, node] : *trainers) {
    const toml::table* t = node.as_table();
    auto kernel = t ? (*t)["kernel"].value<std::string>() : std::nullopt;
    if (!kernel) {
      std::cerr << "tickmark: [trainers." << name.str() << "] needs kernel = \"...\"\n";
      return kExitUsage;
    }
    for (const auto& [key, unused] : *t) {
      if (key.str() != "kernel" && key.str() != "weight") {
        std::cerr << "tickmark: [trainers." << name.str() << "]: unknown key '" << key.str()
                  << "' (kernel, weight)\n";
        return kExitUsage;
      }
    }
    v1::SetKernelRequest req;
    req.set_session_id(session);
    req.set_trainer(std::string(name.str()));
    req.set_kernel(*kernel);
    req.set_weight((*t)["weight"].value<double>().value_or(1.0));
    requests.push_back(std::move(req));
  }
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  for (const auto& req : requests) {
    v1::SetKernelResponse resp;
    auto ctx = conn->Context();
    if (auto s = conn->Admin().SetKernel(ctx.get(), req, &resp); !s.ok()) {
      std::cerr << "tickmark: trainer " << req.trainer() << ": ";
      return Fail(*conn, s);
    }
    std::cout << "trainer " << resp.setting().trainer() << ": " << resp.setting().description()
              << ", weight " << resp.setting().weight() << "\n";
  }
  return kExitOk;
}

int Replay(int argc, char** argv) {
  Common c;
  std::string session, name, kernel, trainer_kernels;
  bool overwrite = false;
  FlagSet flags("tickmark replay",
                "Recomputes a session's credit and labels with other delay kernels, stores them\n"
                "as a named derived set (the session's records stay as they are) and compares\n"
                "the labels with the live ones.");
  c.Register(flags);
  flags.String("session", &session, "session id");
  flags.String("name", &name, "name of the derived set to store (e.g. gamma-2-0.28)");
  flags.String("kernel", &kernel, "kernel for every trainer (e.g. gamma:2,0.28); default: as recorded");
  flags.String("trainer-kernels", &trainer_kernels,
               "per-trainer kernels: NAME=KERNEL;NAME=KERNEL");
  flags.Bool("overwrite", &overwrite, "replace a derived set of the same name");
  if (int e = ParseOrExit(flags, argc, argv, 2, 0); e >= 0) return e;
  if (session.empty() || name.empty()) {
    std::cerr << "tickmark: --session and --name are required\n";
    return kExitUsage;
  }
  v1::ReplayRequest req;
  req.set_session_id(session);
  req.set_name(name);
  req.set_kernel(kernel);
  req.set_overwrite(overwrite);
  std::stringstream list(trainer_kernels);
  for (std::string item; std::getline(list, item, ';');) {
    if (item.empty()) continue;
    auto eq = item.find('=');
    if (eq == std::string::npos) {
      std::cerr << "tickmark: --trainer-kernels wants NAME=KERNEL;NAME=KERNEL\n";
      return kExitUsage;
    }
    (*req.mutable_trainer_kernels())[item.substr(0, eq)] = item.substr(eq + 1);
  }
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  auto ctx = conn->StreamContext();
  auto reader = conn->Admin().Replay(ctx.get(), req);
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
      std::cerr << "\rreplaying [" << std::string(filled, '#') << std::string(width - filled, ' ')
                << "] " << p.done() << "/" << p.total() << " records" << std::flush;
    }
  }
  if (tty) std::cerr << "\n";
  grpc::Status s = reader->Finish();
  if (!s.ok()) return Fail(*conn, s);
  if (!finished) {
    std::cerr << "tickmark: the server ended the replay without a result\n";
    return kExitError;
  }
  std::cout << "derived set '" << name << "' stored for " << session << "\n"
            << "labels compared     " << result.labels() << "\n"
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

int Export(int argc, char** argv) {
  Common c;
  std::string session, out_path, kinds;
  int64_t from = 1;
  bool follow = false;
  FlagSet flags("tickmark export",
                "Writes a session's records as JSON Lines (one object per record, in sequence\n"
                "order, every record with its session time), readable by pandas.read_json(\n"
                "path, lines=True).");
  c.Register(flags);
  flags.String("session", &session, "session id");
  flags.String("out", &out_path, "file to write (default: stdout)");
  flags.String("kinds", &kinds,
               "only these kinds, comma-separated: feedback, step, probe, clock_model, marker, "
               "client_event, session_event, credit, label, unmatched");
  flags.Int("from", &from, "first sequence number");
  flags.Bool("follow", &follow, "keep following live records until interrupted");
  if (int e = ParseOrExit(flags, argc, argv, 2, 0); e >= 0) return e;
  if (session.empty()) {
    std::cerr << "tickmark: --session is required\n";
    return kExitUsage;
  }
  v1::SubscribeRequest req;
  req.set_session_id(session);
  req.set_from_sequence(static_cast<uint64_t>(std::max<int64_t>(1, from)));
  req.set_stop_at_end(!follow);
  std::stringstream list(kinds);
  for (std::string k; std::getline(list, k, ',');) {
    if (k.empty()) continue;
    std::string upper = "RECORD_KIND_";
    for (char ch : k) upper += static_cast<char>(std::toupper(static_cast<unsigned char>(ch)));
    v1::RecordKind kind;
    if (!v1::RecordKind_Parse(upper, &kind)) {
      std::cerr << "tickmark: unknown record kind '" << k << "'\n";
      return kExitUsage;
    }
    req.add_kinds(kind);
  }
  auto conn = Connection::Open(c);
  if (!conn) return kExitError;
  std::ofstream file;
  if (!out_path.empty()) {
    file.open(out_path, std::ios::trunc);
    if (!file) {
      std::cerr << "tickmark: cannot write " << out_path << "\n";
      return kExitError;
    }
  }
  std::ostream& out = out_path.empty() ? std::cout : file;
  auto ctx = conn->StreamContext();
  auto reader = conn->Live().Subscribe(ctx.get(), req);
  v1::Record r;
  uint64_t n = 0;
  auto last_report = std::chrono::steady_clock::now();
  const bool progress = !out_path.empty() && isatty(2);
  while (reader->Read(&r)) {
    out << RecordToJsonLine(r) << "\n";
    ++n;
    if (progress && std::chrono::steady_clock::now() - last_report > std::chrono::milliseconds(200)) {
      std::cerr << "\rexported " << n << " records (through #" << r.sequence() << ")" << std::flush;
      last_report = std::chrono::steady_clock::now();
    }
  }
  if (progress) std::cerr << "\r";
  grpc::Status s = reader->Finish();
  out.flush();
  if (!s.ok()) return Fail(*conn, s);
  if (!out_path.empty()) std::cerr << "exported " << n << " records to " << out_path << "\n";
  return kExitOk;
}

}  // namespace
}  // namespace tickmark::cli

int main(int argc, char** argv) {
  using namespace tickmark::cli;
  // Shared flags may come before the command ("tickmark --server H:P session
  // list"): move them behind it, where each command parses them.
  std::vector<char*> args{argv[0]}, leading;
  int i = 1;
  while (i < argc && std::string(argv[i]).rfind("--", 0) == 0 && std::string(argv[i]) != "--help") {
    std::string a = argv[i];
    leading.push_back(argv[i++]);
    if (a.find('=') == std::string::npos && a != "--insecure" && i < argc) leading.push_back(argv[i++]);
  }
  for (; i < argc; ++i) args.push_back(argv[i]);
  // Flags go after "GROUP VERB" (or after "export").
  const bool one_word = args.size() > 1 && (std::string(args[1]) == "export" ||
                                           std::string(args[1]) == "replay");
  size_t insert_at = std::min<size_t>(args.size(), one_word ? 2 : 3);
  args.insert(args.begin() + static_cast<long>(insert_at), leading.begin(), leading.end());
  args.push_back(nullptr);
  argc = static_cast<int>(args.size()) - 1;
  argv = args.data();
  std::string group = argc > 1 ? argv[1] : "";
  std::string verb = argc > 2 ? argv[2] : "";
  if (group.empty() || group == "--help" || group == "-h" || group == "help") {
    std::cout << kOverview << kSafety << "\n";
    return group.empty() ? kExitUsage : kExitOk;
  }
  static const std::map<std::string, int (*)(int, char**)> kCommands = {
      {"session create", SessionCreate}, {"session list", SessionList},
      {"session show", SessionShow},     {"session close", SessionClose},
      {"token issue", TokenIssue},       {"token list", TokenList},
      {"token revoke", TokenRevoke},     {"marker add", MarkerAdd},
      {"kernel set", KernelSet},         {"kernel load", KernelLoad},
  };
  if (group == "export") return Export(argc, argv);
  if (group == "replay") return Replay(argc, argv);
  auto it = kCommands.find(group + " " + verb);
  if (it == kCommands.end()) {
    std::cerr << "tickmark: unknown command '" << group << (verb.empty() ? "" : " " + verb)
              << "' (see tickmark --help)\n";
    return kExitUsage;
  }
  return it->second(argc, argv);
}

// A real PostgreSQL 15 server for tests, created in a temporary folder and
// removed afterwards (header-only; tests/python/pg_fixture.py is the same
// for the Python tests).
//
//   std::string why;
//   auto pg = PgServer::Start(&why);
//   if (!pg) GTEST_SKIP() << why;
//   std::string url = pg->NewDatabase();   // postgresql://postgres@127.0.0.1:PORT/tm_N
//
// Debian's server binaries (/usr/lib/postgresql/15/bin, package
// postgresql-15). initdb and pg_ctl refuse to run as root, so as root they
// run as the `postgres` system user (runuser) in a folder it owns; as
// another user they run as that user. The server listens on 127.0.0.1 at a
// free port and on a unix socket in the folder, trusts local connections
// (initdb -A trust: a throw-away cluster), and is stopped with
// `pg_ctl stop -m immediate` by the destructor. Start returns null with the
// reason when it cannot run here (no binaries, root without a postgres
// user), so tests skip with that reason instead of failing.
#ifndef TICKMARK_TESTS_SUPPORT_PG_SERVER_H_
#define TICKMARK_TESTS_SUPPORT_PG_SERVER_H_

#include <netinet/in.h>
#include <pwd.h>
#include <sys/socket.h>
#include <sys/stat.h>
#include <unistd.h>

#include <atomic>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <memory>
#include <string>

namespace tickmark::testing {

class PgServer {
 public:
  static constexpr const char* kBinDir = "/usr/lib/postgresql/15/bin";

  // `fsync`: off for tests (a crash of PostgreSQL itself is not what they
  // test, and it spares the shared disk), on for benchmarks.
  static std::unique_ptr<PgServer> Start(std::string* why_not, bool fsync = false) {
    if (!std::filesystem::exists(std::string(kBinDir) + "/initdb")) {
      *why_not = std::string("no PostgreSQL 15 server binaries in ") + kBinDir +
                 " (Debian package postgresql-15)";
      return nullptr;
    }
    std::unique_ptr<PgServer> s(new PgServer());
    if (geteuid() == 0) {
      const passwd* pw = getpwnam("postgres");
      if (pw == nullptr) {
        *why_not =
            "running as root and there is no 'postgres' user to run initdb and pg_ctl as "
            "(they refuse root)";
        return nullptr;
      }
      s->uid_ = pw->pw_uid;
      s->gid_ = pw->pw_gid;
      s->as_ = "runuser -u postgres -- ";
    }
    std::string tmpl = (std::filesystem::temp_directory_path() / "tm-pg-XXXXXX").string();
    if (mkdtemp(tmpl.data()) == nullptr) {
      *why_not = "mkdtemp failed";
      return nullptr;
    }
    s->dir_ = tmpl;
    chmod(s->dir_.c_str(), 0700);
    if (geteuid() == 0 && chown(s->dir_.c_str(), s->uid_, s->gid_) != 0) {
      *why_not = "cannot give the temporary folder to the postgres user";
      return nullptr;
    }
    s->port_ = FreePort();
    const std::string data = s->dir_ + "/data";
    if (!s->Sh("initdb -D " + data +
               " -U postgres -A trust -E UTF8 --no-sync "
               "--no-instructions > " +
               s->dir_ + "/initdb.log 2>&1")) {
      *why_not = "initdb failed: " + ReadAll(s->dir_ + "/initdb.log");
      return nullptr;
    }
    const std::string opts = "-c listen_addresses=127.0.0.1 -p " + std::to_string(s->port_) +
                             " -k " + s->dir_ + " -c fsync=" + (fsync ? "on" : "off") +
                             " -c max_connections=200 -c shared_buffers=32MB";
    if (!s->Sh("pg_ctl -D " + data + " -l " + s->dir_ + "/server.log -w -t 60 -o '" + opts +
               "' start > " + s->dir_ + "/pg_ctl.log 2>&1")) {
      *why_not = "pg_ctl start failed: " + ReadAll(s->dir_ + "/pg_ctl.log") +
                 ReadAll(s->dir_ + "/server.log");
      return nullptr;
    }
    s->running_ = true;
    return s;
  }

  ~PgServer() {
    if (running_) {
      Sh("pg_ctl -D " + dir_ + "/data -m immediate -w stop > /dev/null 2>&1");
    }
    if (!dir_.empty()) {
      std::error_code ec;
      std::filesystem::remove_all(dir_, ec);
    }
  }

  int port() const { return port_; }
  const std::string& dir() const { return dir_; }
  std::string Url(const std::string& db = "postgres") const {
    return "postgresql://postgres@127.0.0.1:" + std::to_string(port_) + "/" + db;
  }
  // A new, empty database (tm_1, tm_2, ...); its URL.
  std::string NewDatabase() {
    const std::string name = "tm_" + std::to_string(++databases_);
    Psql("postgres", "CREATE DATABASE " + name);
    return Url(name);
  }
  // psql -At: the output of one SQL command (empty on error; the error is
  // in *error when given).
  std::string Psql(const std::string& db, const std::string& sql,
                   std::string* error = nullptr) const {
    const std::string out = dir_ + "/psql.out";
    const std::string err = dir_ + "/psql.err";
    const std::string cmd = "psql -X -At -v ON_ERROR_STOP=1 -h 127.0.0.1 -p " +
                            std::to_string(port_) + " -U postgres -d " + db + " -c \"" + sql +
                            "\" > " + out + " 2> " + err;
    const bool ok = std::system(cmd.c_str()) == 0;
    if (error != nullptr) *error = ok ? std::string() : ReadAll(err);
    std::string text = ReadAll(out);
    while (!text.empty() && text.back() == '\n') text.pop_back();
    return text;
  }

 private:
  PgServer() = default;
  bool Sh(const std::string& cmd) const {
    return std::system((as_ + std::string(kBinDir) + "/" + cmd).c_str()) == 0;
  }
  static std::string ReadAll(const std::string& path) {
    std::string out;
    if (FILE* f = std::fopen(path.c_str(), "r")) {
      char buf[4096];
      size_t n;
      while ((n = std::fread(buf, 1, sizeof buf, f)) > 0) out.append(buf, n);
      std::fclose(f);
    }
    return out;
  }
  static int FreePort() {
    int fd = socket(AF_INET, SOCK_STREAM, 0);
    sockaddr_in a{};
    a.sin_family = AF_INET;
    a.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
    a.sin_port = 0;
    socklen_t len = sizeof a;
    bind(fd, reinterpret_cast<sockaddr*>(&a), sizeof a);
    getsockname(fd, reinterpret_cast<sockaddr*>(&a), &len);
    close(fd);
    return ntohs(a.sin_port);
  }

  std::string dir_;
  std::string as_;
  uid_t uid_ = 0;
  gid_t gid_ = 0;
  int port_ = 0;
  int databases_ = 0;
  bool running_ = false;
};

}  // namespace tickmark::testing

#endif  // TICKMARK_TESTS_SUPPORT_PG_SERVER_H_

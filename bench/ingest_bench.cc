// Durable ingest rate (docs/architecture.md §9): feedback acknowledged per second
// through trainer streams of an in-process tickmarkd on loopback, against a
// raw SQLite baseline that inserts the same rows (the same schema — the
// ledger's own migrations — and the same two rows per feedback: the record
// journal and the feedback table; WAL, synchronous=NORMAL, foreign keys on)
// in transactions of 100 and of 1000 rows. Both are measured in this run, on
// this machine, so the ratio is what to read, not the absolute numbers. A
// last row carries the same messages over a bare gRPC stream (no tickmark):
// what the transport alone allows.
//
// Every stream pipelines: it keeps up to --window feedback unacknowledged
// and counts acks (an ack means the record is committed). Clients and the
// server share the machine's cores, as they would on one host.
//
// Prints; never asserts. Runtime is bounded: about --seconds per row.
#include <grpcpp/generic/async_generic_service.h>
#include <grpcpp/generic/generic_stub.h>
#include <grpcpp/grpcpp.h>
#include <sqlite3.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <condition_variable>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <memory>
#include <mutex>
#include <string>
#include <thread>
#include <vector>

#include "bench/bench_server.h"
#include "bench/proc_stats.h"
#include "server/base/log.h"
#include "server/ledger/sqlite/migrations.h"
#include "server/rpc/server.h"
#include "tests/e2e/live_stream.h"

namespace tickmark::bench {
namespace {

using e2e::Clock;
namespace v1 = tickmark::v1;

struct Config {
  double seconds = 3.0;  // measuring time per row of the table
  std::vector<int> streams = {1, 4};
  size_t window = 256;      // unacknowledged feedback per stream
  bool ack_batches = true;  // ask for AckBatch (stream.proto); --single-acks: one per Ack
};

struct Result {
  std::string what;
  uint64_t rows = 0;
  double seconds = 0;
  double cpu_seconds = 0;         // user + system CPU over `seconds`: this process's
  double client_cpu_seconds = 0;  // ... and the client process's (tickmarkd rows)
  double rate() const { return seconds > 0 ? static_cast<double>(rows) / seconds : 0; }
  double cpu_us_per_row() const {
    return rows > 0 ? cpu_seconds * 1e6 / static_cast<double>(rows) : 0;
  }
  double client_cpu_us_per_row() const {
    return rows > 0 ? client_cpu_seconds * 1e6 / static_cast<double>(rows) : 0;
  }
};

double Since(Clock::time_point t0) {
  return std::chrono::duration<double>(Clock::now() - t0).count();
}

bool Exec(sqlite3* db, const char* sql) {
  char* err = nullptr;
  if (sqlite3_exec(db, sql, nullptr, nullptr, &err) != SQLITE_OK) {
    std::fprintf(stderr, "ingest_bench: sqlite: %s\n", err ? err : "?");
    sqlite3_free(err);
    return false;
  }
  return true;
}

// A feedback record body as the server stores it (protobuf Record, hash empty).
std::string SampleBody(const std::string& session, uint64_t seq) {
  v1::Record r;
  r.set_session_id(session);
  r.set_sequence(seq);
  r.set_written_session_ns(1'700'000'000'000'000'000 + static_cast<int64_t>(seq) * 1'000'000);
  v1::Feedback* f = r.mutable_feedback();
  f->set_client_id("bench-trainer-0");
  f->set_client_sequence(seq);
  f->set_trainer("ava");
  f->set_value(seq % 2 ? 1.0 : -1.0);
  f->set_event_source_ns(123'456'789'000 + static_cast<int64_t>(seq) * 1'000'000);
  f->set_arrival_session_ns(r.written_session_ns());
  f->set_event_session_ns(r.written_session_ns() - 300'000'000);
  f->set_uncertainty_ns(150'000);
  f->set_input("script");
  std::string out;
  r.SerializeToString(&out);
  return out;
}

// Raw SQLite: the same rows the ledger writes per feedback, `per_txn` per
// transaction, for `seconds`.
Result RawSqlite(const std::string& dir, int per_txn, double seconds) {
  Result res;
  res.what = "raw SQLite, " + std::to_string(per_txn) + " rows/txn";
  const std::string path = dir + "/raw-" + std::to_string(per_txn) + ".db";
  sqlite3* db = nullptr;
  if (sqlite3_open(path.c_str(), &db) != SQLITE_OK) return res;
  bool ok = Exec(db, "PRAGMA journal_mode=WAL; PRAGMA foreign_keys=ON; PRAGMA synchronous=NORMAL;");
  for (const auto& m : ledger::SqliteMigrations()) ok = ok && Exec(db, m.sql);
  ok = ok && Exec(db,
                  "INSERT INTO session (id, title, state, opened_session_ns, utc_anchor_ns, "
                  "mono_anchor_ns) VALUES ('s-bench', 'bench', 'open', 1, 1, 1)");
  sqlite3_stmt* journal = nullptr;
  sqlite3_stmt* typed = nullptr;
  ok = ok &&
       sqlite3_prepare_v2(db,
                          "INSERT INTO record (session_id, seq, kind, written_session_ns, "
                          "client_id, client_seq, body, hash) VALUES (?, ?, 'feedback', ?, ?, ?, "
                          "?, ?)",
                          -1, &journal, nullptr) == SQLITE_OK &&
       sqlite3_prepare_v2(db,
                          "INSERT INTO feedback (session_id, seq, client_id, client_seq, trainer, "
                          "value, input, event_source_ns, arrival_session_ns, event_session_ns, "
                          "uncertainty_ns, late) VALUES (?,?,?,?,?,?,?,?,?,?,?,?)",
                          -1, &typed, nullptr) == SQLITE_OK;
  // Columns named: later migrations add columns with defaults (a positional
  // insert broke silently when one did and the baseline read 0 rows/s).
  if (!ok) std::fprintf(stderr, "ingest_bench: raw baseline: %s\n", sqlite3_errmsg(db));
  const std::string body = SampleBody("s-bench", 1);
  const std::string hash(32, '\x5a');
  uint64_t seq = 0;
  const auto t0 = Clock::now();
  const double cpu0 = CpuSeconds(0);
  while (ok && Since(t0) < seconds) {
    ok = Exec(db, "BEGIN IMMEDIATE");
    for (int i = 0; ok && i < per_txn; ++i) {
      ++seq;
      const auto s = static_cast<sqlite3_int64>(seq);
      const sqlite3_int64 t = 1'700'000'000'000'000'000 + s * 1'000'000;
      sqlite3_reset(journal);
      sqlite3_bind_text(journal, 1, "s-bench", -1, SQLITE_STATIC);
      sqlite3_bind_int64(journal, 2, s);
      sqlite3_bind_int64(journal, 3, t);
      sqlite3_bind_text(journal, 4, "bench-trainer-0", -1, SQLITE_STATIC);
      sqlite3_bind_int64(journal, 5, s);
      sqlite3_bind_blob(journal, 6, body.data(), static_cast<int>(body.size()), SQLITE_STATIC);
      sqlite3_bind_blob(journal, 7, hash.data(), static_cast<int>(hash.size()), SQLITE_STATIC);
      ok = sqlite3_step(journal) == SQLITE_DONE;
      sqlite3_reset(typed);
      sqlite3_bind_text(typed, 1, "s-bench", -1, SQLITE_STATIC);
      sqlite3_bind_int64(typed, 2, s);
      sqlite3_bind_text(typed, 3, "bench-trainer-0", -1, SQLITE_STATIC);
      sqlite3_bind_int64(typed, 4, s);
      sqlite3_bind_text(typed, 5, "ava", -1, SQLITE_STATIC);
      sqlite3_bind_double(typed, 6, seq % 2 ? 1.0 : -1.0);
      sqlite3_bind_text(typed, 7, "script", -1, SQLITE_STATIC);
      sqlite3_bind_int64(typed, 8, 123'456'789'000 + s * 1'000'000);
      sqlite3_bind_int64(typed, 9, t);
      sqlite3_bind_int64(typed, 10, t - 300'000'000);
      sqlite3_bind_int64(typed, 11, 150'000);
      sqlite3_bind_int64(typed, 12, 0);
      ok = ok && sqlite3_step(typed) == SQLITE_DONE;
    }
    if (!ok) std::fprintf(stderr, "ingest_bench: insert: %s\n", sqlite3_errmsg(db));
    ok = ok && Exec(db, "COMMIT");
    if (ok) res.rows = seq;
  }
  res.seconds = Since(t0);
  res.cpu_seconds = CpuSeconds(0) - cpu0;
  sqlite3_finalize(journal);
  sqlite3_finalize(typed);
  sqlite3_close(db);
  return res;
}

// The client process's measuring protocol: after a short warm-up
// (connections, first clock probes) prints "PHASE measuring", waits
// `seconds`, then prints "PHASE done" and "RESULT <acknowledged> <seconds>".
void MeasureAcked(const std::atomic<uint64_t>& acked, double seconds) {
  std::this_thread::sleep_for(std::chrono::milliseconds(300));
  std::printf("PHASE measuring\n");
  std::fflush(stdout);
  const uint64_t a0 = acked.load();
  const auto t0 = Clock::now();
  std::this_thread::sleep_until(
      t0 + std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(seconds)));
  const uint64_t rows = acked.load() - a0;
  std::printf("PHASE done\nRESULT %llu %.6f\n", static_cast<unsigned long long>(rows), Since(t0));
  std::fflush(stdout);
}

// The client process (this program started again with --client): `streams`
// trainer streams to `target`, each on its own connection, pipelining up to
// the window. Prints "PHASE measuring", then after the measuring time
// "PHASE done" and "RESULT <acknowledged> <seconds>" on stdout.
int ClientMain(const std::string& target, const std::string& token, int streams,
               const Config& config) {
  std::atomic<uint64_t> acked{0};
  std::atomic<bool> stop{false};
  std::vector<std::unique_ptr<e2e::TrainerStream>> open;
  for (int i = 0; i < streams; ++i) {
    // Distinct channel arguments keep gRPC from sharing one connection.
    grpc::ChannelArguments args;
    args.SetInt("tickmark.bench.stream", i);
    auto channel = grpc::CreateCustomChannel(target, grpc::InsecureChannelCredentials(), args);
    auto stream = std::make_unique<e2e::TrainerStream>(channel, [&acked](const v1::Ack& a) {
      if (a.code() == 0) acked.fetch_add(1, std::memory_order_relaxed);
    });
    if (config.ack_batches) stream->RequestAckBatches();
    if (!stream->Hello(token, "bench-trainer-" + std::to_string(i),
                       Clock::now() + std::chrono::seconds(10))) {
      std::fprintf(stderr, "ingest_bench: no welcome on stream %d\n", i);
      return 1;
    }
    open.push_back(std::move(stream));
  }
  std::vector<std::thread> senders;
  for (auto& stream : open) {
    senders.emplace_back([&stop, &config, s = stream.get()] {
      const auto deadline = Clock::now() + std::chrono::seconds(60);
      for (uint64_t seq = 1; !stop.load(); ++seq) {
        const bool room = s->WaitFor(
            [&](const e2e::TrainerStream::State& st) {
              return st.ended || stop.load() || seq - 1 - st.acks.size() < config.window;
            },
            deadline);
        if (!room || stop.load() || !s->Send(e2e::Feedback(seq, seq % 2 ? 1.0 : -1.0))) break;
      }
    });
  }
  MeasureAcked(acked, config.seconds);
  stop = true;
  for (auto& stream : open) stream->Cancel();  // wakes a sender blocked in Write
  for (auto& t : senders) t.join();
  return 0;
}

// Runs the client process (this program with `args`) and reads its result
// into *res: acknowledged rows, the measuring time, and both processes' CPU
// over it.
void RunClient(const std::string& self, const std::vector<std::string>& args, Result* res) {
  pid_t pid = 0;
  FILE* in = StartSelf(self, args, &pid);
  if (in == nullptr) return;
  char line[256];
  double cpu0 = 0, ccpu0 = 0;
  while (std::fgets(line, sizeof line, in) != nullptr) {
    if (std::strncmp(line, "PHASE measuring", 15) == 0) {
      cpu0 = CpuSeconds(0);
      ccpu0 = CpuSeconds(pid);
    } else if (std::strncmp(line, "PHASE done", 10) == 0) {
      res->cpu_seconds = CpuSeconds(0) - cpu0;
      res->client_cpu_seconds = CpuSeconds(pid) - ccpu0;
    } else if (std::strncmp(line, "RESULT ", 7) == 0) {
      unsigned long long rows = 0;
      std::sscanf(line + 7, "%llu %lf", &rows, &res->seconds);
      res->rows = rows;
    }
  }
  std::fclose(in);
  int status = 0;
  waitpid(pid, &status, 0);
  if (!WIFEXITED(status) || WEXITSTATUS(status) != 0 || res->seconds == 0) {
    std::fprintf(stderr, "ingest_bench: the client process for \"%s\" failed (status %d)\n",
                 res->what.c_str(), status);
  }
}

// The transport alone: a bare gRPC bidi stream (callback API, generic
// service, nothing of tickmark) that carries the same serialised feedback
// message one way and, back, the count received so far whenever no reply is
// being written (acks batched, as tickmarkd does when asked). What one
// message costs gRPC and the kernel on this machine, without the ledger.
class BareIngestService final : public grpc::CallbackGenericService {
 public:
  grpc::ServerGenericBidiReactor* CreateReactor(grpc::GenericCallbackServerContext*) override {
    class Reactor final : public grpc::ServerGenericBidiReactor {
     public:
      Reactor() { StartRead(&in_); }
      void OnReadDone(bool ok) override {
        std::lock_guard<std::mutex> lock(mu_);
        if (!ok) {
          reads_done_ = true;
          if (!writing_) FinishOnce(grpc::Status::OK);
          return;
        }
        ++count_;
        if (writing_) {
          pending_ = true;
        } else {
          WriteCount();
        }
        StartRead(&in_);
      }
      void OnWriteDone(bool ok) override {
        std::lock_guard<std::mutex> lock(mu_);
        writing_ = false;
        if (!ok) return FinishOnce(grpc::Status::CANCELLED);
        if (pending_) {
          pending_ = false;
          WriteCount();
        } else if (reads_done_) {
          FinishOnce(grpc::Status::OK);
        }
      }
      void OnDone() override { delete this; }

     private:
      void WriteCount() {  // under mu_
        grpc::Slice slice(&count_, sizeof count_);
        out_ = grpc::ByteBuffer(&slice, 1);
        writing_ = true;
        StartWrite(&out_);
      }
      void FinishOnce(const grpc::Status& status) {  // under mu_
        if (finished_) return;
        finished_ = true;
        Finish(status);
      }
      std::mutex mu_;
      grpc::ByteBuffer in_, out_;
      uint64_t count_ = 0;
      bool writing_ = false, pending_ = false, reads_done_ = false, finished_ = false;
    };
    return new Reactor;
  }
};

// The client side of the bare stream: keeps up to `window` messages
// unacknowledged, like the trainer streams.
class BareIngestClient final : public grpc::ClientBidiReactor<grpc::ByteBuffer, grpc::ByteBuffer> {
 public:
  BareIngestClient(grpc::GenericStub* stub, size_t window, std::atomic<uint64_t>* acked)
      : window_(window), acked_(acked) {
    const std::string bytes = e2e::Feedback(1, 1.0).SerializeAsString();
    grpc::Slice slice(bytes);
    request_ = grpc::ByteBuffer(&slice, 1);
    stub->PrepareBidiStreamingCall(&context_, "/tickmark.bench.Bare/Ingest", grpc::StubOptions(),
                                   this);
    StartRead(&reply_);
    {
      std::lock_guard<std::mutex> lock(mu_);
      MaybeWrite();
    }
    StartCall();
  }
  void OnWriteDone(bool ok) override {
    std::lock_guard<std::mutex> lock(mu_);
    writing_ = false;
    if (ok) MaybeWrite();
  }
  void OnReadDone(bool ok) override {
    if (!ok) return;
    std::vector<grpc::Slice> slices;
    uint64_t count = 0;
    if (reply_.Dump(&slices).ok() && !slices.empty() && slices[0].size() == sizeof count) {
      std::memcpy(&count, slices[0].begin(), sizeof count);
    }
    StartRead(&reply_);
    std::lock_guard<std::mutex> lock(mu_);
    if (count > acked_local_) {
      acked_->fetch_add(count - acked_local_, std::memory_order_relaxed);
      acked_local_ = count;
    }
    MaybeWrite();
  }
  void OnDone(const grpc::Status&) override {
    std::lock_guard<std::mutex> lock(mu_);
    done_ = true;
    cv_.notify_all();
  }
  void Stop() {
    context_.TryCancel();
    std::unique_lock<std::mutex> lock(mu_);
    cv_.wait(lock, [this] { return done_; });
  }

 private:
  void MaybeWrite() {  // under mu_
    if (writing_ || sent_ - acked_local_ >= window_) return;
    writing_ = true;
    ++sent_;
    StartWrite(&request_);
  }
  const size_t window_;
  std::atomic<uint64_t>* acked_;
  grpc::ClientContext context_;
  grpc::ByteBuffer request_, reply_;
  std::mutex mu_;
  std::condition_variable cv_;
  uint64_t sent_ = 0, acked_local_ = 0;
  bool writing_ = false, done_ = false;
};

int BareClientMain(const std::string& target, const Config& config) {
  std::atomic<uint64_t> acked{0};
  grpc::GenericStub stub(grpc::CreateChannel(target, grpc::InsecureChannelCredentials()));
  BareIngestClient client(&stub, config.window, &acked);
  MeasureAcked(acked, config.seconds);
  client.Stop();
  return 0;
}

Result BareIngest(const std::string& self, const Config& config) {
  Result res;
  res.what = "bare gRPC stream, no tickmark (window " + std::to_string(config.window) + ")";
  BareIngestService service;
  int port = 0;
  std::unique_ptr<grpc::Server> server = StartBareServer(&service, &port);
  if (!server) {
    std::fprintf(stderr, "ingest_bench: the bare gRPC server did not start\n");
    return res;
  }
  RunClient(
      self,
      {"--client", "--bare", "--target=127.0.0.1:" + std::to_string(port),
       "--window=" + std::to_string(config.window), "--seconds=" + std::to_string(config.seconds)},
      &res);
  server->Shutdown(std::chrono::system_clock::now() + std::chrono::seconds(1));
  return res;
}

// tickmarkd in this process; its trainer streams in a second process (this
// program with --client), so each side's CPU is measured on its own.
Result ServerIngest(const std::string& self, int streams, const Config& config) {
  Result res;
  res.what = "tickmarkd, " + std::to_string(streams) + " trainer stream" +
             (streams > 1 ? "s" : "") + " (window " + std::to_string(config.window) + ")";
  auto server = BenchServer::Start("ingest_bench", BenchServer::WithoutRateLimits());
  if (!server) return res;
  e2e::SessionWithToken session;
  if (!server->CreateSession("ingest bench", v1::ROLE_TRAINER, "ava", &session)) return res;
  std::vector<std::string> args = {"--client",
                                   "--target=" + server->target(),
                                   "--token=" + session.token,
                                   "--streams=" + std::to_string(streams),
                                   "--window=" + std::to_string(config.window),
                                   "--seconds=" + std::to_string(config.seconds)};
  if (!config.ack_batches) args.push_back("--single-acks");
  RunClient(self, args, &res);
  return res;
}

void Usage() {
  std::printf(
      "ingest_bench [--seconds=S] [--streams=1,4] [--window=N] [--single-acks]\n"
      "  Durable feedback ingest through tickmarkd's trainer streams vs raw SQLite\n"
      "  inserts of the same rows; the streams run in a second process (this program\n"
      "  with --client), so tickmarkd's CPU is measured alone. A last row sends the\n"
      "  same messages over a bare gRPC stream (the transport's own bound). Prints a\n"
      "  table; asserts nothing.\n");
}

}  // namespace
}  // namespace tickmark::bench

int main(int argc, char** argv) {
  using namespace tickmark::bench;
  Config config;
  bool client = false, bare_client = false;
  std::string target, token;
  for (int i = 1; i < argc; ++i) {
    const std::string a = argv[i];
    if (a == "--client") {
      client = true;  // the client process (started by this program itself)
    } else if (a == "--bare") {
      bare_client = true;  // ... of the bare gRPC row
    } else if (a.rfind("--target=", 0) == 0) {
      target = a.substr(9);
    } else if (a.rfind("--token=", 0) == 0) {
      token = a.substr(8);
    } else if (a.rfind("--seconds=", 0) == 0) {
      config.seconds = std::atof(a.c_str() + 10);
    } else if (a == "--single-acks") {
      config.ack_batches = false;
    } else if (a.rfind("--window=", 0) == 0) {
      config.window = static_cast<size_t>(std::atol(a.c_str() + 9));
    } else if (a.rfind("--streams=", 0) == 0) {
      config.streams.clear();
      std::string list = a.substr(10);
      for (size_t p = 0; p <= list.size();) {
        size_t q = list.find(',', p);
        if (q == std::string::npos) q = list.size();
        if (q > p) config.streams.push_back(std::atoi(list.substr(p, q - p).c_str()));
        p = q + 1;
      }
    } else {
      Usage();
      return a == "--help" || a == "-h" ? 0 : 2;
    }
  }
  if (config.seconds <= 0 || config.seconds > 60 || config.window == 0 || config.streams.empty()) {
    Usage();
    return 2;
  }
  tickmark::SetLogLevel(tickmark::LogLevel::kWarning);
  if (client && bare_client) return BareClientMain(target, config);
  if (client) return ClientMain(target, token, config.streams.front(), config);
  std::error_code self_error;
  const std::string self = std::filesystem::read_symlink("/proc/self/exe", self_error).string();

  std::string tmpl =
      (std::filesystem::temp_directory_path() / "tickmark-ingest-bench-XXXXXX").string();
  if (mkdtemp(tmpl.data()) == nullptr) return 1;
  const std::string dir = tmpl;

  std::printf("ingest_bench: durable feedback ingest, %.1f s per row, %u hardware threads\n",
              config.seconds, std::thread::hardware_concurrency());
  std::printf("  durability: WAL, synchronous=NORMAL (tickmarkd --durability=process)\n\n");
  std::vector<Result> results;
  results.push_back(RawSqlite(dir, 100, config.seconds));
  results.push_back(RawSqlite(dir, 1000, config.seconds));
  for (int n : config.streams) results.push_back(ServerIngest(self, n, config));
  results.push_back(BareIngest(self, config));

  const double base100 = results[0].rate();
  const double base1000 = results[1].rate();
  std::printf("%-44s %9s %7s %10s %8s %8s %6s %9s %6s %9s\n", "path", "rows", "seconds", "rows/s",
              "/raw100", "/raw1000", "cores", "CPU µs/row", "client", "µs/row");
  for (const Result& r : results) {
    std::printf("%-44s %9llu %7.2f %10.0f %8.3f %8.3f %6.2f %9.1f ", r.what.c_str(),
                static_cast<unsigned long long>(r.rows), r.seconds, r.rate(),
                base100 > 0 ? r.rate() / base100 : 0.0, base1000 > 0 ? r.rate() / base1000 : 0.0,
                r.seconds > 0 ? r.cpu_seconds / r.seconds : 0.0, r.cpu_us_per_row());
    if (r.client_cpu_seconds > 0) {
      std::printf("%6.2f %9.1f\n", r.seconds > 0 ? r.client_cpu_seconds / r.seconds : 0.0,
                  r.client_cpu_us_per_row());
    } else {
      std::printf("%6s %9s\n", "-", "-");
    }
  }
  std::printf(
      "\nrows/s for tickmarkd counts acknowledged (committed) feedback; each feedback\n"
      "is one record-journal row plus one feedback row, as in the raw baseline.\n"
      "cores and CPU µs/row: this process over the row's time (/proc/self/stat): the raw\n"
      "loop, or tickmarkd and its SQLite; the trainer streams run in a second process\n"
      "(client). hardware threads / (server CPU µs/row) is the most tickmarkd could ack\n"
      "on this machine with every core to itself and nothing waiting.\n");
  // Targets (issue 16): one stream >= 0.5 × raw batched inserts (the better
  // of the two batch sizes), and more streams no slower than one.
  const double raw = std::max(base100, base1000);
  const Result* one = nullptr;
  const Result* most = nullptr;
  int most_streams = 1;
  const Result& bare = results.back();
  for (size_t i = 2; i < 2 + config.streams.size(); ++i) {
    const int n = config.streams[i - 2];
    if (n == 1) one = &results[i];
    if (n > most_streams) {
      most = &results[i];
      most_streams = n;
    }
  }
  std::printf(
      "\nprofile (December 2026; DEVELOPERS.md, Performance): tickmarkd alone takes ~1.3-1.4\n"
      "cores and ~55-70 µs of CPU per acknowledged feedback on one stream, its client ~14-17\n"
      "µs, a raw row ~4-7 µs. perf over the same row (server and client then in one process):\n"
      "kernel ~35%% (loopback TCP sendmsg/recvmsg, futex wake-ups between the gRPC, strand\n"
      "and writer threads), libc ~18%% (malloc/free of messages), SQLite ~17%% (small\n"
      "transactions: each group commit rewrites the b-tree pages it touched, ~2.5x the raw\n"
      "cost per row), tickmark ~9%%, gRPC ~8%%, SHA-256 chain ~4%%, protobuf ~4%%. The bare\n"
      "gRPC row is the transport's share: one message per feedback each way costs both\n"
      "processes together more than a raw row costs SQLite, so on two cores the 0.5 target\n"
      "is out of reach for any server of one message per feedback, tickmarkd or not.\n");
  std::printf("\ntargets (ratios against raw SQLite measured in this run):\n");
  if (one != nullptr && raw > 0) {
    const double r = one->rate() / raw;
    std::printf("  one stream / raw SQLite batched = %.3f   target >= 0.5: %s\n", r,
                r >= 0.5 ? "met" : "NOT met");
    // The server's CPU per acknowledged feedback against what the machine
    // has: the rate if tickmarkd had every core and nothing waited.
    const double cores = std::thread::hardware_concurrency();
    if (one->cpu_us_per_row() > 0) {
      const double ceiling = cores * 1e6 / one->cpu_us_per_row();
      std::printf(
          "  tickmarkd's CPU ceiling for one stream: %.0f cores / %.1f µs per feedback = %.0f/s"
          " = %.3f x raw\n"
          "  (its trainer stream costs the client %.1f µs more per feedback; a raw row %.1f µs)\n",
          cores, one->cpu_us_per_row(), ceiling, ceiling / raw, one->client_cpu_us_per_row(),
          results[1].cpu_us_per_row());
    }
  }
  // The floor for any durable server of one gRPC message per feedback: what
  // gRPC and the kernel charge both processes per message (nothing of
  // tickmark) plus the raw row's own insert, on all the cores.
  if (bare.rows > 0 && raw > 0) {
    const double cores = std::thread::hardware_concurrency();
    const double row_us = results[1].cpu_us_per_row();
    const double both = bare.cpu_us_per_row() + bare.client_cpu_us_per_row() + row_us;
    const double bound = both > 0 ? cores * 1e6 / both : 0;
    std::printf(
        "  transport alone (bare gRPC row): %.0f/s = %.3f x raw; it costs %.1f µs (server)\n"
        "  + %.1f µs (client) per message; with the row's own %.1f µs, on %.0f cores no gRPC\n"
        "  ingest of one message per feedback passes %.0f/s = %.3f x raw here%s\n",
        bare.rate(), bare.rate() / raw, bare.cpu_us_per_row(), bare.client_cpu_us_per_row(), row_us,
        cores, bound, bound / raw, bound / raw < 0.5 ? " (below the target: out of reach)" : "");
    if (one != nullptr && one->cpu_us_per_row() > 0) {
      std::printf("  tickmarkd's cost above the transport: %.1f µs per feedback on the server\n",
                  one->cpu_us_per_row() - bare.cpu_us_per_row());
    }
  }
  if (one != nullptr && most != nullptr && one->rate() > 0) {
    const double r = most->rate() / one->rate();
    std::printf("  %s / one stream = %.3f   target >= 1: %s\n", most->what.c_str(), r,
                r >= 1 ? "met" : "NOT met");
    if (one->cpu_us_per_row() > 0) {
      std::printf("  (tickmarkd's CPU per feedback, %d streams / one: %.2f)\n", most_streams,
                  most->cpu_us_per_row() / one->cpu_us_per_row());
    }
  }
  std::error_code ec;
  std::filesystem::remove_all(dir, ec);
  return 0;
}

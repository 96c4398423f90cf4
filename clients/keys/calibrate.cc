#include "clients/keys/calibrate.h"

#include <errno.h>
#include <fcntl.h>
#include <poll.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <condition_variable>
#include <cstdio>
#include <cstring>
#include <iostream>
#include <map>
#include <memory>
#include <mutex>
#include <optional>
#include <random>
#include <string>
#include <thread>
#include <vector>

#include "clients/common/calibration_task.h"
#include "clients/keys/calibration_screen.h"
#include "clients/keys/evdev.h"
#include "clients/keys/terminal.h"

namespace tickmark::keys {
namespace {

// The program's name for messages (argv[0]'s base name).
std::string ProgramName() {
  const char* p = program_invocation_short_name;
  return p != nullptr && *p != 0 ? p : "tickmark";
}
using client::CalibrationInput;
using client::CalibrationInputAnswer;
using client::CalibrationMoveView;
using client::CalibrationProgress;

void WriteAll(const std::string& s) {
  size_t done = 0;
  while (done < s.size()) {
    const ssize_t n = write(STDOUT_FILENO, s.data() + done, s.size() - done);
    if (n < 0 && errno == EINTR) continue;
    if (n <= 0) return;
    done += static_cast<size_t>(n);
  }
}

std::string InputsOf(const std::map<std::string, Binding>& bindings, int sign, bool quit) {
  std::string out;
  for (const auto& [key, b] : bindings) {
    const bool match = quit ? b.action == Binding::Action::kQuit
                            : b.action == Binding::Action::kFeedback &&
                                  ((sign > 0 && b.value > 0) || (sign < 0 && b.value < 0));
    if (!match) continue;
    if (!out.empty()) out += ", ";
    out += key;
  }
  return out.empty() ? "(none bound)" : out;
}

// The terminal as the task's display and input: two lines, the track above
// the status line; the cursor stays on the status line.
class TerminalIo final : public client::CalibrationDisplay, public client::CalibrationInputSource {
 public:
  TerminalIo(const MonotonicSource* clock, RawTerminal* terminal, KeyMap* keymap,
             ExternalAnswers* external, int wake_fd, std::atomic<bool>* quit,
             client::TrainerClient* client, uint32_t cells, uint32_t practice_total)
      : clock_(clock),
        terminal_(terminal),
        keymap_(keymap),
        external_(external),
        wake_fd_(wake_fd),
        quit_(quit),
        client_(client),
        cells_(cells),
        practice_total_(practice_total) {}

  void Begin(uint32_t cell) {
    track_ = FormatTrack(cells_, cell, "ready");
    WriteAll("\r\n\r\n");  // the two lines the frame redraws
    WriteAll(Frame());
  }

  int64_t DrawMove(const CalibrationMoveView& move) override {
    track_ = FormatTrack(cells_, move.to_cell, MoveLabel(move, practice_total_));
    WriteAll(Frame());
    // The presentation time: right after the write returned (see
    // calibration_task.h for what this leaves out).
    return clock_->NowNanos();
  }

  void ShowProgress(const CalibrationProgress& p) override {
    const size_t cols = terminal_->Columns();
    std::string s = FormatCalibrationStatus(p, 0);
    const client::StreamStatus st = client_->status();
    if (!st.connected()) s += std::string(" | ") + client::StreamStateName(st.state);
    if (external_ != nullptr && !external_->Note().empty()) s += " | " + external_->Note();
    if (cols > 1 && s.size() > cols - 1) s.resize(cols - 1);
    if (s == status_) return;  // nothing new to show
    status_ = s;
    WriteAll(Frame());
  }

  CalibrationInput Wait(int64_t until_ns) override {
    CalibrationInput in;
    const int64_t now = clock_->NowNanos();
    int timeout_ms = static_cast<int>(std::max<int64_t>(0, (until_ns - now + 999'999) / 1'000'000));
    if (escape_pending_) timeout_ms = std::min(timeout_ms, 50);
    bool stdin_ready = false;
    if (external_ != nullptr) {
      // The external Poll also ends when stdin has input; the wake pipe
      // (signals) is looked at after, so quitting waits at most 100 ms.
      in = external_->Poll(std::min(timeout_ms, 100), STDIN_FILENO);
      pollfd p{STDIN_FILENO, POLLIN, 0};
      stdin_ready = poll(&p, 1, 0) > 0;
    } else {
      pollfd fds[2] = {{STDIN_FILENO, POLLIN, 0}, {wake_fd_, POLLIN, 0}};
      const int ready = poll(fds, 2, timeout_ms);
      stdin_ready = ready > 0 && (fds[0].revents & (POLLIN | POLLHUP | POLLERR)) != 0;
      if (ready == 0 && escape_pending_) {
        keymap_->FlushPending();
        escape_pending_ = false;
      }
    }
    if (stdin_ready) {
      char buf[256];
      const ssize_t n = read(STDIN_FILENO, buf, sizeof buf);
      const int64_t t = clock_->NowNanos();  // the key's event time
      if (n == 0) in.quit = true;            // the terminal went away
      if (n > 0) {
        escape_pending_ = std::memchr(buf, '\x1b', static_cast<size_t>(n)) != nullptr;
        for (const KeyEvent& e : keymap_->Feed(std::string_view(buf, static_cast<size_t>(n)))) {
          if (e.kind == KeyEvent::Kind::kQuit) {
            in.quit = true;
          } else if (e.kind == KeyEvent::Kind::kFeedback && e.value != 0 && external_ == nullptr) {
            in.answers.push_back({t, e.value > 0, e.input()});
          }
        }
      }
    }
    char drain[64];
    while (read(wake_fd_, drain, sizeof drain) > 0) {
    }
    if (quit_->load()) in.quit = true;
    return in;
  }

  // Waits for any key (or a device press) to start; false if asked to quit.
  bool WaitForStart() {
    while (!quit_->load()) {
      pollfd fds[2] = {{STDIN_FILENO, POLLIN, 0}, {wake_fd_, POLLIN, 0}};
      if (poll(fds, 2, 500) <= 0) continue;
      if ((fds[1].revents & POLLIN) != 0) {
        char drain[64];
        while (read(wake_fd_, drain, sizeof drain) > 0) {
        }
      }
      if ((fds[0].revents & (POLLIN | POLLHUP | POLLERR)) == 0) continue;
      char buf[64];
      const ssize_t n = read(STDIN_FILENO, buf, sizeof buf);
      if (n <= 0) return false;
      for (const KeyEvent& e : keymap_->Feed(std::string_view(buf, static_cast<size_t>(n)))) {
        if (e.kind == KeyEvent::Kind::kQuit) return false;
      }
      keymap_->FlushPending();
      return true;
    }
    return false;
  }

 private:
  std::string Frame() const { return "\r\033[A\033[K" + track_ + "\r\n\033[K" + status_; }

  const MonotonicSource* clock_;
  RawTerminal* terminal_;
  KeyMap* keymap_;
  ExternalAnswers* external_;
  int wake_fd_;
  std::atomic<bool>* quit_;
  client::TrainerClient* client_;
  uint32_t cells_;
  uint32_t practice_total_;
  std::string track_;
  std::string status_;
  bool escape_pending_ = false;
};

class EvdevAnswers final : public ExternalAnswers {
 public:
  EvdevAnswers(EvdevDevice::Options options, const ButtonMap* map)
      : device_(std::move(options)), map_(map) {}
  absl::Status Open() { return device_.Open(); }

  CalibrationInput Poll(int timeout_ms, int also_fd) override {
    CalibrationInput in;
    EvdevDevice::Batch b = device_.Poll(timeout_ms, also_fd);
    if (b.connected) note_.clear();
    if (b.disconnected) note_ = "device gone: " + b.note;
    for (const KeyChange& c : b.changes) {
      if (c.kind != KeyChange::Kind::kPress) continue;  // the judgement is the press
      const std::string name = KeyCodeName(c.code);
      const Binding* binding = map_->Find(name);
      if (binding == nullptr) continue;
      if (binding->action == Binding::Action::kQuit) {
        in.quit = true;
      } else if (binding->value != 0) {
        // The kernel's timestamp of the press (evdev.h), not the read.
        in.answers.push_back({c.time_ns, binding->value > 0, "evdev:" + name});
      }
    }
    return in;
  }
  std::string Describe() const override {
    return device_.info().path + " \"" + device_.info().name + "\"";
  }
  std::string ApproveInputs() const override { return InputsOf(map_->bindings(), +1, false); }
  std::string DisapproveInputs() const override { return InputsOf(map_->bindings(), -1, false); }
  std::string Note() const override { return note_; }

 private:
  EvdevDevice device_;
  const ButtonMap* map_;
  std::string note_;
};

// What the stream's callbacks report about the run.
struct ResultBox {
  std::mutex mu;
  std::condition_variable cv;
  uint64_t finish_sequence = 0;  // client sequence of the finish, once acked
  std::optional<tickmark::v1::Calibration> calibration;
  bool finish_acked = false;
  absl::Status finish_error;  // the finish's rejection
  uint64_t rejected = 0;      // moves and answers rejected
  std::string first_rejection;
};

}  // namespace

std::string InputsWithSign(const std::map<std::string, Binding>& bindings, int sign) {
  return InputsOf(bindings, sign, false);
}

absl::StatusOr<std::unique_ptr<ExternalAnswers>> DeviceAnswers(EvdevDevice::Options options,
                                                               const ButtonMap* map) {
  auto answers = std::make_unique<EvdevAnswers>(std::move(options), map);
  if (absl::Status s = answers->Open(); !s.ok()) return s;
  return std::unique_ptr<ExternalAnswers>(std::move(answers));
}

int RunCalibration(client::TrainerClient& client, client::StreamOptions options,
                   const CalibrationFlags& flags, KeyMap keymap, ExternalAnswers* external) {
  const std::string program = ProgramName();
  const char* kProgram = program.c_str();
  std::random_device entropy;
  auto random64 = [&] { return (static_cast<uint64_t>(entropy()) << 32) ^ entropy(); };
  client::CalibrationTaskOptions topt;
  topt.run = flags.run.empty() ? client::MakeCalibrationRunId(random64()) : flags.run;
  topt.answers = flags.answers;
  topt.practice = flags.practice;
  topt.min_interval_s = flags.min_interval_s;
  topt.max_interval_s = flags.max_interval_s;
  topt.max_moves = flags.max_moves;
  topt.seed = flags.seed != 0 ? flags.seed : random64();
  topt.approve_right = flags.rule != "left";
  if (absl::Status s = client::ValidateCalibrationTaskOptions(topt); !s.ok()) {
    std::cerr << kProgram << ": " << s.message() << "\n";
    return 2;
  }
  if (isatty(STDIN_FILENO) == 0 || isatty(STDOUT_FILENO) == 0) {
    std::cerr << kProgram << ": --calibrate needs a terminal on stdin and stdout\n";
    return 2;
  }
  client::CalibrationTask task(topt);

  RawTerminal terminal(STDIN_FILENO);
  if (absl::Status s = terminal.Enter(); !s.ok()) {
    std::cerr << kProgram << ": " << s.ToString() << "\n";
    return 2;
  }
  int wake[2];
  if (pipe2(wake, O_NONBLOCK | O_CLOEXEC) != 0) {
    std::cerr << kProgram << ": pipe2 failed\n";
    return 1;
  }
  // Closed last, after the signal watcher and the client's callbacks are gone.
  struct PipeCloser {
    int* fds;
    ~PipeCloser() {
      close(fds[0]);
      close(fds[1]);
    }
  } pipe_closer{wake};
  auto poke = [&] { (void)!write(wake[1], "x", 1); };
  std::atomic<bool> quit{false};
  SignalWatcher watcher(
      &terminal,
      [&] {
        quit = true;
        poke();
      },
      poke);

  ResultBox box;
  client::TrainerClient::Callbacks cb;
  cb.on_server_message = [&](const tickmark::v1::ServerMessage& m) {
    if (!m.has_calibration() || m.calibration().run() != topt.run) return;
    std::lock_guard<std::mutex> l(box.mu);
    box.calibration = m.calibration();
    box.cv.notify_all();
  };
  cb.on_request_ack = [&](const client::AckInfo& a, const tickmark::v1::TrainerMessage& m) {
    if (!m.calibration().has_finish()) return;
    std::lock_guard<std::mutex> l(box.mu);
    box.finish_acked = true;
    box.finish_sequence = a.client_sequence;
    box.cv.notify_all();
  };
  cb.on_request_rejected = [&](uint64_t, const tickmark::v1::TrainerMessage& m,
                               const absl::Status& s) {
    std::lock_guard<std::mutex> l(box.mu);
    if (m.calibration().has_finish()) {
      box.finish_error = s;
    } else if (box.rejected++ == 0) {
      box.first_rejection = s.ToString();
    }
    box.cv.notify_all();
  };
  cb.on_state = [&](const client::StreamStatus&) {
    poke();
    box.cv.notify_all();
  };
  if (absl::Status s = client.Connect(std::move(options), std::move(cb)); !s.ok()) {
    terminal.Restore();
    std::cerr << kProgram << ": " << s.ToString() << "\n";
    return 2;
  }

  KeyMap keys = std::move(keymap);
  const std::string approve =
      external != nullptr ? external->ApproveInputs() : InputsOf(keys.bindings(), +1, false);
  const std::string disapprove =
      external != nullptr ? external->DisapproveInputs() : InputsOf(keys.bindings(), -1, false);
  std::string quit_inputs = InputsOf(keys.bindings(), 0, true);
  quit_inputs = (quit_inputs == "(none bound)" ? "" : quit_inputs + " or ") + "Ctrl-C";
  WriteAll(CalibrationInstructions(task, approve, disapprove, quit_inputs));
  if (external != nullptr) {
    WriteAll("Answers come from " + external->Describe() +
             "; the terminal keys only start and stop.\r\n");
  }

  TerminalIo io(client.clock(), &terminal, &keys, external, wake[0], &quit, &client,
                topt.track_cells, topt.practice);
  auto cleanup = [&] { terminal.Restore(); };
  // Start only once connected: the moves' times must reach the server with
  // a clock model, and a trainer should not do the task for an unreachable
  // server (messages would wait in the queue).
  while (true) {
    if (!io.WaitForStart()) {
      cleanup();
      WriteAll("\n");
      std::cerr << kProgram << ": calibration not started; nothing was measured\n";
      (void)client.Close(std::chrono::steady_clock::now() + std::chrono::seconds(2));
      return 1;
    }
    const auto wait_until = std::chrono::steady_clock::now() + std::chrono::seconds(5);
    client::StreamStatus st = client.status();
    while (!st.connected() && st.state != client::StreamState::kFailed && !quit.load() &&
           std::chrono::steady_clock::now() < wait_until) {
      std::this_thread::sleep_for(std::chrono::milliseconds(50));
      st = client.status();
    }
    if (st.state == client::StreamState::kFailed) {
      cleanup();
      std::cerr << kProgram << ": cannot use the server: " << st.last_error.ToString() << "\n";
      (void)client.Close(std::chrono::steady_clock::now() + std::chrono::seconds(2));
      return 1;
    }
    if (st.connected()) break;
    WriteAll(std::string("Not connected to the server yet (") + client::StreamStateName(st.state) +
             (st.last_error.ok() ? "" : ": " + st.last_error.ToString()) +
             "); press a key to try again, q to quit.\r\n");
  }
  io.Begin(topt.track_cells / 2);
  const client::CalibrationRunResult run =
      task.Run(*client.clock(), io, io, [&](tickmark::v1::CalibrationMessage m) {
        tickmark::v1::TrainerMessage msg;
        *msg.mutable_calibration() = std::move(m);
        return client.SendRequest(std::move(msg));
      });
  cleanup();
  WriteAll("\n");
  const CalibrationProgress& p = run.progress;
  std::fprintf(stderr,
               "%s: %s: %u valid of %u wanted; %u moves, %u wrong sign, %u missed, %u double, "
               "%u late or stray (live count; the server's matching decides)\n",
               kProgram, client::CalibrationStopName(run.stop), p.valid, p.wanted, p.moves,
               p.wrong_sign, p.missed, p.double_answers, p.stray);
  if (run.stop == client::CalibrationStop::kSendFailed) {
    std::fprintf(stderr, "%s: %s\n", kProgram, run.send_error.ToString().c_str());
    (void)client.Close(std::chrono::steady_clock::now() + std::chrono::seconds(2));
    return 1;
  }

  tickmark::v1::TrainerMessage finish;
  *finish.mutable_calibration() = task.Finish();
  if (absl::Status s = client.SendRequest(std::move(finish)); !s.ok()) {
    std::fprintf(stderr, "%s: finish not sent: %s\n", kProgram, s.ToString().c_str());
    (void)client.Close(std::chrono::steady_clock::now() + std::chrono::seconds(2));
    return 1;
  }
  std::fprintf(stderr, "%s: sent the run's %llu messages; waiting up to %gs for the fit\n",
               kProgram, static_cast<unsigned long long>(client.status().sent),
               flags.result_timeout_s);
  const auto deadline =
      std::chrono::steady_clock::now() +
      std::chrono::milliseconds(static_cast<int64_t>(flags.result_timeout_s * 1000));
  bool failed = false;
  {
    std::unique_lock<std::mutex> l(box.mu);
    box.cv.wait_until(l, deadline, [&] {
      failed = client.status().state == client::StreamState::kFailed;
      return box.finish_acked || !box.finish_error.ok() || failed;
    });
  }
  const client::StreamStatus before_close = client.status();
  const absl::Status closed =
      client.Close(std::chrono::steady_clock::now() + std::chrono::seconds(5));
  std::lock_guard<std::mutex> l(box.mu);
  if (box.rejected > 0) {
    std::fprintf(stderr, "%s: warning: %llu calibration messages were rejected; first: %s\n",
                 kProgram, static_cast<unsigned long long>(box.rejected),
                 box.first_rejection.c_str());
  }
  if (box.finish_acked && box.calibration.has_value()) {
    std::cout << FormatCalibrationResult(*box.calibration);
    std::cout.flush();
    return 0;
  }
  if (box.finish_acked) {
    std::fprintf(stderr,
                 "%s: the server acknowledged the finish but sent no calibration (does it "
                 "support calibration?)\n",
                 kProgram);
  } else if (!box.finish_error.ok()) {
    std::fprintf(stderr, "%s: no calibration stored: %s\n", kProgram,
                 box.finish_error.ToString().c_str());
  } else if (failed) {
    std::fprintf(stderr, "%s: no calibration: the stream stopped: %s\n", kProgram,
                 client.status().last_error.ToString().c_str());
  } else {
    std::fprintf(stderr,
                 "%s: no result from the server within %gs; %llu of %llu messages "
                 "acknowledged%s; run %s\n",
                 kProgram, flags.result_timeout_s,
                 static_cast<unsigned long long>(before_close.acked),
                 static_cast<unsigned long long>(before_close.sent),
                 before_close.acked == 0 ? " (does this server support calibration?)" : "",
                 topt.run.c_str());
    if (!closed.ok())
      std::fprintf(stderr, "%s: closing: %s\n", kProgram, closed.ToString().c_str());
  }
  return 1;
}

}  // namespace tickmark::keys

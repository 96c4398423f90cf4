// For the benches that run their clients in a second process
// (connections_bench, ingest_bench): starting this program again with its
// stdout on a pipe, and small readers of /proc (proc(5)) for a process's CPU
// time and a line of its status file.
#ifndef TICKMARK_BENCH_PROC_STATS_H_
#define TICKMARK_BENCH_PROC_STATS_H_

#include <sys/types.h>
#include <unistd.h>

#include <cstdio>
#include <cstdlib>
#include <fstream>
#include <iterator>
#include <sstream>
#include <string>
#include <vector>

namespace tickmark::bench {

// Starts `self` (this program's path) with `args` in a child process whose
// stdout is the returned stream (nullptr on failure, the reason on stderr);
// its pid in *pid. The argument vector is made before fork: after it, in a
// process with other threads, only async-signal-safe calls until exec
// (fork(2)).
inline FILE* StartSelf(const std::string& self, const std::vector<std::string>& args, pid_t* pid) {
  std::vector<char*> argv;
  argv.push_back(const_cast<char*>(self.c_str()));
  for (const std::string& a : args) argv.push_back(const_cast<char*>(a.c_str()));
  argv.push_back(nullptr);
  int out[2];
  if (pipe(out) != 0) {
    std::perror("cannot start the client process (pipe)");
    return nullptr;
  }
  *pid = fork();
  if (*pid < 0) {
    std::perror("cannot start the client process (fork)");
    close(out[0]);
    close(out[1]);
    return nullptr;
  }
  if (*pid == 0) {
    dup2(out[1], 1);
    close(out[0]);
    close(out[1]);
    execv(self.c_str(), argv.data());
    _exit(127);
  }
  close(out[1]);
  return fdopen(out[0], "r");
}

// utime + stime of a process in seconds (/proc/PID/stat fields 14, 15;
// proc(5)); pid 0: this process.
inline double CpuSeconds(pid_t pid) {
  std::ifstream in(pid == 0 ? "/proc/self/stat" : "/proc/" + std::to_string(pid) + "/stat");
  std::string all((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
  const size_t close = all.rfind(')');
  if (close == std::string::npos) return 0;
  std::istringstream rest(all.substr(close + 2));
  std::string field;
  unsigned long long utime = 0, stime = 0;
  for (int i = 3; i <= 15 && rest >> field; ++i) {
    if (i == 14) utime = std::stoull(field);
    if (i == 15) stime = std::stoull(field);
  }
  return static_cast<double>(utime + stime) / static_cast<double>(sysconf(_SC_CLK_TCK));
}

// A numeric field of /proc/PID/status ("VmRSS" in kB, "Threads"); pid 0:
// this process.
inline long StatusField(pid_t pid, const std::string& name) {
  std::ifstream in(pid == 0 ? "/proc/self/status" : "/proc/" + std::to_string(pid) + "/status");
  std::string line;
  while (std::getline(in, line)) {
    if (line.rfind(name + ":", 0) == 0) return std::atol(line.c_str() + name.size() + 1);
  }
  return 0;
}

}  // namespace tickmark::bench

#endif  // TICKMARK_BENCH_PROC_STATS_H_

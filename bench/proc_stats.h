// Small readers of /proc for the benches that run their clients in a second
// process (connections_bench, ingest_bench): a process's CPU time and a line
// of its status file (proc(5)).
#ifndef TICKMARK_BENCH_PROC_STATS_H_
#define TICKMARK_BENCH_PROC_STATS_H_

#include <sys/types.h>
#include <unistd.h>

#include <cstdlib>
#include <fstream>
#include <iterator>
#include <sstream>
#include <string>

namespace tickmark::bench {

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

// A tiny learner outside tickmark's tree: connects with an agent token,
// publishes a few steps, waits until the server has stored them, and reads
// them back from the session's records (a fresh session: only its own). Settled labels would come
// the same way (kinds = {RECORD_KIND_LABEL}), but only after the trainer's delay horizon plus the
// allowed lateness, several seconds after a step.
#include <chrono>
#include <cstdlib>
#include <iostream>
#include <string>

#include "clients/agent/agent.h"
#include "tickmark/version.h"

int main(int argc, char** argv) {
  tickmark::agent::Agent::Options options;
  int steps = 5;
  for (int i = 1; i < argc; ++i) {
    const std::string arg = argv[i];
    if (arg == "--help" || arg == "-h") {
      std::cout << "usage: cpp-agent [--server HOST:PORT] [--token-file FILE] [--steps N]\n";
      return 0;
    }
    if (arg == "--version") {
      std::cout << "cpp-agent (tickmark agent library " << tickmark::kVersion << ", wire contract "
                << tickmark::kContractVersion << ")\n";
      return 0;
    }
    if (i + 1 >= argc) {
      std::cerr << "cpp-agent: " << arg << " needs a value (see --help)\n";
      return 2;
    }
    const std::string value = argv[++i];
    if (arg == "--server") {
      options.server = value;
    } else if (arg == "--token-file") {
      options.token_file = value;
    } else if (arg == "--steps") {
      steps = std::atoi(value.c_str());
    } else {
      std::cerr << "cpp-agent: unknown flag " << arg << " (see --help)\n";
      return 2;
    }
  }
  options.description = "cpp-agent example";
  auto agent = tickmark::agent::Agent::Connect(options);
  if (!agent.ok()) {
    std::cerr << "cpp-agent: " << agent.status() << "\n";
    return 1;
  }
  const char* kActions[] = {"north", "east", "south", "west"};
  for (int i = 0; i < steps; ++i) {
    tickmark::agent::Step step;
    step.action = kActions[i % 4];
    step.state = std::to_string(i);
    step.features = {static_cast<float>(i)};
    if (auto id = (*agent)->Publish(step); !id.ok()) {
      std::cerr << "cpp-agent: " << id.status() << "\n";
      return 1;
    }
  }
  if (auto s = (*agent)->Flush(std::chrono::seconds(30)); !s.ok()) {
    std::cerr << "cpp-agent: " << s << "\n";
    return 1;
  }
  // The stored steps, from the start to the current end.
  auto records = (*agent)->Subscribe(
      {.from_sequence = 1, .kinds = {tickmark::v1::RECORD_KIND_STEP}, .follow = false});
  int read = 0;
  while (auto record = records->Next(std::chrono::seconds(10))) {
    if (record->has_step()) ++read;
  }
  std::cout << "session " << (*agent)->session_id() << ": published " << steps
            << " steps, read back " << read << "\n";
  (void)(*agent)->Close(std::chrono::seconds(5));
  return read == steps ? 0 : 1;
}

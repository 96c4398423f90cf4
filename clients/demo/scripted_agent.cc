// tickmark-scripted-agent: a stand-in agent for the foundation demo. A dock
// rover wanders a 10x10 warehouse floor (docs/architecture.md §8) at a fixed step rate
// and publishes every step (action, position as state and features) to
// tickmarkd through the reconnecting agent stream. It does not learn; the
// learning demo replaces it.
#include <chrono>
#include <cstdio>
#include <iostream>
#include <random>
#include <thread>

#include "clients/common/channel.h"
#include "clients/common/connection_flags.h"
#include "clients/common/stream_client.h"
#include "clients/common/token.h"
#include "server/base/flags.h"

int main(int argc, char** argv) {
  tickmark::client::ConnectionFlags connection;
  connection.client_id = "scripted-rover";
  int64_t seconds = 5, steps_per_second = 5, seed = 1;
  CLI::App app("A rover that wanders a 10x10 floor and publishes its steps (no learning).",
               "tickmark-scripted-agent");
  tickmark::ConfigureApp(app);
  tickmark::client::AddConnectionFlags(app, &connection);
  app.add_option("--seconds", seconds, "how long to run")->check(CLI::Range(int64_t{0}, int64_t{86400}));
  app.add_option("--rate", steps_per_second, "steps per second")
      ->check(CLI::Range(int64_t{1}, int64_t{1000}));
  app.add_option("--seed", seed, "random seed");
  if (auto exit = tickmark::ParseCommandLine(app, argc, argv)) return *exit;
  auto token = tickmark::client::ReadToken(connection.token);
  if (!token.ok()) {
    std::cerr << "tickmark-scripted-agent: " << token.status().message() << "\n";
    return 2;
  }
  for (const std::string& w : token->warnings) {
    std::cerr << "tickmark-scripted-agent: warning: " << w << "\n";
  }
  auto creds = tickmark::client::ChooseCredentials(connection.channel);
  if (!creds.ok()) {
    std::cerr << "tickmark-scripted-agent: " << creds.status().message() << "\n";
    return 2;
  }
  tickmark::client::AgentClient agent;
  tickmark::client::StreamOptions o;
  o.target = connection.channel.target;
  o.token = token->value;
  o.client_id = connection.client_id;
  o.source = {tickmark::v1::SOURCE_KIND_SCRIPT, "scripted dock rover", "tickmark-scripted-agent"};
  o.credentials = creds->credentials;
  o.send_realtime = !connection.no_realtime;
  if (auto s = agent.Connect(o); !s.ok()) {
    std::cerr << "tickmark-scripted-agent: " << s.message() << "\n";
    return 1;
  }
  tickmark::SystemMonotonic clock;
  std::mt19937_64 rng(static_cast<uint64_t>(seed));
  const char* kActions[] = {"north", "south", "east", "west", "wait"};
  int x = 0, y = 0;
  const auto period = std::chrono::nanoseconds(1'000'000'000 / steps_per_second);
  auto next = std::chrono::steady_clock::now();
  const int64_t total = seconds * steps_per_second;
  for (int64_t i = 1; i <= total; ++i) {
    int a = static_cast<int>(rng() % 5);
    x = std::clamp(x + (a == 2) - (a == 3), 0, 9);
    y = std::clamp(y + (a == 0) - (a == 1), 0, 9);
    tickmark::v1::StepMessage step;
    step.set_step_id(static_cast<uint64_t>(i));
    step.set_start_agent_ns(clock.NowNanos());
    step.set_action(kActions[a]);
    step.set_state(std::to_string(x) + "," + std::to_string(y));
    step.add_features(static_cast<float>(x));
    step.add_features(static_cast<float>(y));
    if (auto s = agent.Send(step); !s.ok()) {
      std::cerr << "tickmark-scripted-agent: " << s.message() << "\n";
      return 1;
    }
    next += period;
    std::this_thread::sleep_until(next);  // paces the simulated rover
  }
  auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(10);
  absl::Status flushed = agent.Flush(deadline);
  agent.Close(deadline).IgnoreError();
  auto st = agent.status();
  std::cerr << "tickmark-scripted-agent: " << st.sent << " steps sent, " << st.acked
            << " acknowledged, " << st.rejected << " rejected\n";
  return flushed.ok() && st.rejected == 0 ? 0 : 1;
}

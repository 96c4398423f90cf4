// DevicePump: the loop body of tickmark-keys --device — reads an EvdevDevice,
// maps presses through a ButtonMap and sends feedback on a TrainerClient,
// stamped with the kernel's event time. Also keeps the figures for the
// --verbose timing report: how much later the program read each press than
// the kernel stamped it (what the kernel timestamp saves).
//
// Not thread-safe: one thread calls Step(). The device and map must outlive it;
// the client is borrowed.
#ifndef TICKMARK_CLIENTS_KEYS_DEVICE_PUMP_H_
#define TICKMARK_CLIENTS_KEYS_DEVICE_PUMP_H_

#include <cstdint>
#include <string>
#include <vector>

#include "clients/common/stream_client.h"
#include "clients/keys/button_map.h"
#include "clients/keys/evdev.h"

namespace tickmark::keys {

// Read-time minus event-time figures, in nanoseconds.
struct DelayStats {
  uint64_t count = 0;
  int64_t min_ns = 0;
  int64_t max_ns = 0;
  double sum_ns = 0;
  void Add(int64_t d);
  // "n=12 mean 0.41 ms min 0.12 ms max 1.90 ms", or "none".
  std::string Format() const;
};

class DevicePump {
 public:
  struct StepResult {
    bool quit = false;
    std::vector<std::string> notes;  // connected, unplugged, dropped, unbound
  };

  DevicePump(EvdevDevice* device, const ButtonMap* map, client::TrainerClient* client)
      : device_(device), map_(map), client_(client) {}

  StepResult Step(int timeout_ms, int wake_fd = -1);

  uint64_t sent() const { return sent_; }
  const DelayStats& read_delay() const { return read_delay_; }
  const std::string& last_sent() const { return last_sent_; }
  // The --verbose timing report for this source.
  std::string Report() const;

 private:
  EvdevDevice* device_;
  const ButtonMap* map_;
  client::TrainerClient* client_;
  uint64_t sent_ = 0;
  uint64_t seen_drops_ = 0;
  uint64_t seen_lost_ = 0;
  DelayStats read_delay_;
  std::string last_sent_;
};

}  // namespace tickmark::keys

#endif  // TICKMARK_CLIENTS_KEYS_DEVICE_PUMP_H_

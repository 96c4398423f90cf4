// MarkerFollower: follows the markers of the session an observer token
// names (Live.Subscribe, kinds = marker) so tickmark-serial --sync-out can
// send a pulse at each (docs/sync.md, "Markers"). A trainer token cannot
// read records, hence the separate token. Markers already in the session
// when it starts are skipped; reconnects resume after the last one seen.
#ifndef TICKMARK_CLIENTS_SERIAL_MARKER_FOLLOW_H_
#define TICKMARK_CLIENTS_SERIAL_MARKER_FOLLOW_H_

#include <atomic>
#include <cstdint>
#include <functional>
#include <memory>
#include <mutex>
#include <string>
#include <thread>

#include "grpcpp/grpcpp.h"

namespace tickmark::serial {

class MarkerFollower {
 public:
  // on_marker(sequence, text) runs on the follower's thread.
  using MarkerFn = std::function<void(uint64_t sequence, const std::string& text)>;
  using NoteFn = std::function<void(const std::string& note)>;
  // The session id (the trainer stream's Welcome); empty while unknown.
  using SessionFn = std::function<std::string()>;
  MarkerFollower(std::shared_ptr<grpc::Channel> channel, std::string token, SessionFn session,
                 MarkerFn on_marker, NoteFn on_note);
  ~MarkerFollower();
  void Start();
  void Stop();

 private:
  void Run();
  std::shared_ptr<grpc::Channel> channel_;
  std::string token_;
  SessionFn session_;
  MarkerFn on_marker_;
  NoteFn on_note_;
  std::atomic<bool> stop_{false};
  std::mutex mu_;
  grpc::ClientContext* current_ = nullptr;
  std::thread thread_;
};

}  // namespace tickmark::serial

#endif  // TICKMARK_CLIENTS_SERIAL_MARKER_FOLLOW_H_

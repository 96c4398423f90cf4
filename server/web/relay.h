// The bridge between a page's WebSocket and the server's own gRPC services
// (docs/architecture.md, "The web bridge"). A relay turns one page into one
// ordinary gRPC client of tickmarkd, through an in-process channel:
//
//   TrainRelay  /ws/train  a Train stream: the page's hello, feedback, probe
//                          replies and calibration messages go up; welcome,
//                          acks, probes and calibration results come down,
//                          plus the server's clock model of the page.
//   LiveRelay   /ws/live   a SubscribeBatches stream (read-only), from the page's
//                          last sequence, plus the session's summary.
//
// So a page is timed, validated, rate limited, deduplicated and recorded by
// exactly the code every other client meets; the bridge adds no rule of its
// own beyond the size of a message and the bounded queue to the page.
//
// Never slows ingest: the relay only reads from the subscription as fast
// as gRPC gives records and hands each to the page's socket, whose queue is
// bounded; a page that falls behind is dropped (it reconnects and resumes
// from its last sequence), never waited for.
//
// Lifetimes: the socket owns its relay until the page goes away
// (OnPageClosed); a relay owns its gRPC call until the call is done, and
// holds the socket until then to send the end. Thread safety: every method
// may be called from any thread.
#ifndef TICKMARK_SERVER_WEB_RELAY_H_
#define TICKMARK_SERVER_WEB_RELAY_H_

#include <grpcpp/grpcpp.h>

#include <condition_variable>
#include <memory>
#include <mutex>
#include <string>

#include "server/rpc/session_hub.h"

namespace tickmark::web {

// The page's end of a relay: a WebSocket (http_server.cc), or a fake in
// tests. Thread-safe.
class PageSocket {
 public:
  virtual ~PageSocket() = default;
  // Queues a text message for the page; never blocks. If the queue is over
  // its bound the socket drops the page (closes with a reason) instead.
  virtual void Send(std::string text) = 0;
  // Sends what is queued, then closes. Idempotent.
  virtual void Close() = 0;
};

class Relay {
 public:
  virtual ~Relay() = default;
  // A text message from the page, in the order they came.
  virtual void OnPageMessage(std::string text) = 0;
  // The page went away (or the server is stopping): the gRPC call is
  // cancelled. Idempotent.
  virtual void OnPageClosed() = 0;
};

// Counts the gRPC calls relays have open, so that stopping the web port can
// wait until no gRPC thread will touch a socket again. Thread-safe.
class CallTracker {
 public:
  void Add();
  void Done();
  // True once no call is open; false if `timeout` passed first.
  bool WaitIdle(Duration timeout);
  int open() const;

 private:
  mutable std::mutex mu_;
  std::condition_variable cv_;
  int open_ = 0;  // GUARDED_BY(mu_)
};

// What relays share: the channel to the server's own services and the
// session hub (for the clock model of a trainer page).
struct RelayContext {
  std::shared_ptr<grpc::Channel> channel;
  rpc::SessionHub* hub = nullptr;  // not owned; may be null (no clock updates)
  // The page's messages queued for the gRPC stream, at most; past it the
  // page is dropped (it reconnects and resends).
  size_t max_pending_writes = 1024;
  std::shared_ptr<CallTracker> calls = std::make_shared<CallTracker>();
};

std::shared_ptr<Relay> MakeTrainRelay(const RelayContext& context, std::shared_ptr<PageSocket> page,
                                      std::string user_agent);
std::shared_ptr<Relay> MakeLiveRelay(const RelayContext& context, std::shared_ptr<PageSocket> page);

}  // namespace tickmark::web

#endif  // TICKMARK_SERVER_WEB_RELAY_H_

#include "clients/serial/marker_follow.h"

#include <chrono>

#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::serial {

namespace v1 = tickmark::v1;

MarkerFollower::MarkerFollower(std::shared_ptr<grpc::Channel> channel, std::string token,
                               SessionFn session, MarkerFn on_marker, NoteFn on_note)
    : channel_(std::move(channel)),
      token_(std::move(token)),
      session_(std::move(session)),
      on_marker_(std::move(on_marker)),
      on_note_(std::move(on_note)) {}

MarkerFollower::~MarkerFollower() { Stop(); }

void MarkerFollower::Start() {
  thread_ = std::thread([this] { Run(); });
}

void MarkerFollower::Stop() {
  stop_ = true;
  {
    std::lock_guard<std::mutex> l(mu_);
    if (current_ != nullptr) current_->TryCancel();
  }
  if (thread_.joinable()) thread_.join();
}

void MarkerFollower::Run() {
  v1::Live::Stub stub(channel_);
  uint64_t next = 0;  // 0: not yet known which markers are old
  bool said_error = false;
  while (!stop_) {
    // The session is the trainer stream's (from its Welcome).
    const std::string session = session_();
    if (session.empty()) {
      std::this_thread::sleep_for(std::chrono::milliseconds(100));
      continue;
    }
    v1::SubscribeRequest req;
    grpc::ClientContext ctx;
    ctx.AddMetadata("authorization", "Bearer " + token_);
    req.set_session_id(session);
    req.add_kinds(v1::RECORD_KIND_MARKER);
    if (next == 0) {
      req.set_stop_at_end(true);  // the markers already there: skipped
    } else {
      req.set_from_sequence(next);
    }
    {
      std::lock_guard<std::mutex> l(mu_);
      if (stop_) break;
      current_ = &ctx;
    }
    auto reader = stub.Subscribe(&ctx, req);
    v1::Record r;
    uint64_t last = 0;
    while (reader->Read(&r)) {
      last = r.sequence();
      if (next != 0 && r.has_marker()) on_marker_(r.sequence(), r.marker().text());
    }
    grpc::Status s = reader->Finish();
    {
      std::lock_guard<std::mutex> l(mu_);
      current_ = nullptr;
    }
    if (stop_) break;
    if (next == 0 && s.ok()) {
      next = last + 1;  // the markers read were old; a later one is new
      on_note_("following markers from record #" + std::to_string(next));
      said_error = false;
      continue;
    }
    if (next != 0 && last != 0) next = last + 1;
    if (!s.ok() && !said_error) {
      on_note_("marker feed: " + s.error_message() + "; retrying");
      said_error = true;
    }
    for (int i = 0; i < 20 && !stop_; ++i) {
      std::this_thread::sleep_for(std::chrono::milliseconds(100));
    }
  }
}

}  // namespace tickmark::serial

#include "server/web/relay.h"

#include <deque>
#include <functional>
#include <mutex>

#include "server/web/page_messages.h"
#include "tickmark/v1/admin.grpc.pb.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::web {
namespace {

namespace v1 = tickmark::v1;

// One Train call on the gRPC callback API. Owns itself (self_) from Start
// until OnDone has run. A hold keeps OnDone from running while the relay may
// still write; it is removed once, when the call stops writing (the server
// ended the stream, or the page went away).
class TrainCall final : public grpc::ClientBidiReactor<v1::TrainerMessage, v1::ServerMessage> {
 public:
  using OnMessage = std::function<void(const v1::ServerMessage&)>;
  using OnEnd = std::function<void(const grpc::Status&)>;

  static std::shared_ptr<TrainCall> Start(const RelayContext& context, v1::TrainerMessage hello,
                                          OnMessage on_message, OnEnd on_end) {
    std::shared_ptr<TrainCall> call(
        new TrainCall(context.calls, std::move(on_message), std::move(on_end)));
    context.calls->Add();
    call->self_ = call;
    call->stub_ = v1::Live::NewStub(context.channel);
    call->stub_->async()->Train(&call->ctx_, call.get());
    call->StartRead(&call->in_);
    call->AddHold();
    {
      std::lock_guard<std::recursive_mutex> lock(call->mu_);
      call->out_.push_back(std::move(hello));
      call->writing_ = true;
      call->StartWrite(&call->out_.front());
    }
    call->StartCall();
    return call;
  }

  // Queues a message for the server. False when the call no longer writes
  // or `max_pending` messages are waiting already.
  bool Write(v1::TrainerMessage message, size_t max_pending) {
    std::lock_guard<std::recursive_mutex> lock(mu_);
    if (stopped_ || out_.size() >= max_pending) return false;
    out_.push_back(std::move(message));
    if (!writing_) {
      writing_ = true;
      StartWrite(&out_.front());
    }
    return true;
  }

  void Cancel() {
    ctx_.TryCancel();
    StopWriting();
  }

  void OnWriteDone(bool ok) override {
    std::lock_guard<std::recursive_mutex> lock(mu_);
    out_.pop_front();
    // A failed write means the stream is over: the read fails too, and
    // OnReadDone stops writing.
    if (!ok || stopped_ || out_.empty()) {
      writing_ = false;
      return;
    }
    StartWrite(&out_.front());
  }

  void OnReadDone(bool ok) override {
    if (!ok) {
      StopWriting();
      return;
    }
    on_message_(in_);
    StartRead(&in_);
  }

  void OnDone(const grpc::Status& status) override {
    on_end_(status);
    std::shared_ptr<CallTracker> calls = calls_;
    std::shared_ptr<TrainCall> keep = std::move(self_);  // may be the last reference
    keep.reset();
    calls->Done();
  }

 private:
  TrainCall(std::shared_ptr<CallTracker> calls, OnMessage on_message, OnEnd on_end)
      : calls_(std::move(calls)), on_message_(std::move(on_message)), on_end_(std::move(on_end)) {}

  void StopWriting() {
    {
      std::lock_guard<std::recursive_mutex> lock(mu_);
      if (stopped_) return;
      stopped_ = true;
    }
    // Outside the lock: every StartWrite happened under it before stopped_
    // was set, and none follows.
    RemoveHold();
  }

  const std::shared_ptr<CallTracker> calls_;
  const OnMessage on_message_;
  const OnEnd on_end_;
  std::unique_ptr<v1::Live::Stub> stub_;
  grpc::ClientContext ctx_;
  v1::ServerMessage in_;
  // Recursive: a reaction may run on the thread that started the operation.
  std::recursive_mutex mu_;
  std::deque<v1::TrainerMessage> out_;  // front is being written; GUARDED_BY(mu_)
  bool writing_ = false;                // GUARDED_BY(mu_)
  bool stopped_ = false;                // GUARDED_BY(mu_)
  std::shared_ptr<TrainCall> self_;
};

// Hands the server's clock model of one client to its page.
class ClockSink final : public rpc::RecordSink {
 public:
  ClockSink(std::string client_id, std::shared_ptr<PageSocket> page)
      : client_id_(std::move(client_id)), page_(std::move(page)) {}
  void OnCommitted(const std::vector<v1::Record>& records) override {
    for (const v1::Record& r : records) {
      if (r.has_clock_model() && r.clock_model().client_id() == client_id_) {
        page_->Send(ClockToPage(r.clock_model()));
      }
    }
  }

 private:
  const std::string client_id_;
  const std::shared_ptr<PageSocket> page_;
};

class TrainRelay final : public Relay, public std::enable_shared_from_this<TrainRelay> {
 public:
  TrainRelay(const RelayContext& context, std::shared_ptr<PageSocket> page, std::string user_agent)
      : context_(context), page_(std::move(page)), user_agent_(std::move(user_agent)) {}
  ~TrainRelay() override { DropSink(); }

  void OnPageMessage(std::string text) override {
    auto message = ParseTrainerPageMessage(text);
    std::unique_lock<std::mutex> lock(mu_);
    if (closed_) return;
    if (!message.ok()) {
      return Fail(std::move(lock), grpc::StatusCode::INVALID_ARGUMENT,
                  std::string(message.status().message()));
    }
    if (!call_) {
      if (!message->has_hello()) {
        return Fail(std::move(lock), grpc::StatusCode::INVALID_ARGUMENT,
                    "the first message must be a hello");
      }
      StampHello(message->mutable_hello(), user_agent_);
      client_id_ = message->hello().client_id();
      lock.unlock();
      // Started with no lock held: a reaction may run on this thread.
      std::weak_ptr<TrainRelay> weak = weak_from_this();
      std::shared_ptr<TrainCall> call = TrainCall::Start(
          context_, std::move(*message),
          [weak](const v1::ServerMessage& m) {
            if (auto self = weak.lock()) self->FromServer(m);
          },
          [weak](const grpc::Status& s) {
            if (auto self = weak.lock()) self->ServerEnded(s);
          });
      lock.lock();
      call_ = call;
      const bool closed = closed_;
      lock.unlock();
      if (closed) call->Cancel();  // the page went away meanwhile
      return;
    }
    if (message->has_hello()) {
      return Fail(std::move(lock), grpc::StatusCode::INVALID_ARGUMENT, "one hello per connection");
    }
    if (!call_->Write(std::move(*message), context_.max_pending_writes)) {
      return Fail(std::move(lock), grpc::StatusCode::RESOURCE_EXHAUSTED,
                  "too many messages waiting for the server; reconnect and resend");
    }
  }

  void OnPageClosed() override {
    std::shared_ptr<TrainCall> call;
    {
      std::lock_guard<std::mutex> lock(mu_);
      closed_ = true;
      call = call_;
    }
    if (call) call->Cancel();
    DropSink();
  }

 private:
  // Tells the page why, closes it and cancels the call.
  void Fail(std::unique_lock<std::mutex> lock, grpc::StatusCode code, const std::string& why) {
    closed_ = true;
    std::shared_ptr<TrainCall> call = call_;
    lock.unlock();
    page_->Send(EndToPage(static_cast<int>(code), why));
    page_->Close();
    if (call) call->Cancel();
  }

  void FromServer(const v1::ServerMessage& m) {
    page_->Send(ServerMessageToPage(m));
    if (m.has_welcome() && context_.hub != nullptr) {
      std::shared_ptr<rpc::SessionRuntime> runtime = context_.hub->Find(m.welcome().session_id());
      if (!runtime) return;
      auto sink = std::make_unique<ClockSink>(client_id_, page_);
      std::lock_guard<std::mutex> lock(mu_);
      if (closed_ || sink_) return;
      runtime->AddSink(sink.get());
      runtime_ = std::move(runtime);
      sink_ = std::move(sink);
    }
  }

  // The sink stays until OnPageClosed, which the socket calls on its own
  // thread once the page is gone: this may run on any gRPC thread.
  void ServerEnded(const grpc::Status& status) {
    {
      std::lock_guard<std::mutex> lock(mu_);
      closed_ = true;
    }
    page_->Send(EndToPage(static_cast<int>(status.error_code()),
                          status.ok() ? "the server ended the stream" : status.error_message()));
    page_->Close();
  }

  void DropSink() {
    std::unique_ptr<ClockSink> sink;
    std::shared_ptr<rpc::SessionRuntime> runtime;
    {
      std::lock_guard<std::mutex> lock(mu_);
      sink = std::move(sink_);
      runtime = std::move(runtime_);
    }
    // Not under mu_: RemoveSink waits for a delivery in progress, which
    // only posts to the page.
    if (sink && runtime) runtime->RemoveSink(sink.get());
  }

  const RelayContext context_;
  const std::shared_ptr<PageSocket> page_;
  const std::string user_agent_;
  std::mutex mu_;
  bool closed_ = false;                           // GUARDED_BY(mu_)
  std::shared_ptr<TrainCall> call_;               // GUARDED_BY(mu_)
  std::string client_id_;                         // set before the call starts; then read-only
  std::shared_ptr<rpc::SessionRuntime> runtime_;  // GUARDED_BY(mu_)
  std::unique_ptr<ClockSink> sink_;               // GUARDED_BY(mu_)
};

// One SubscribeBatches call on the server's own channel (so never an older
// server): a burst of records (a feedback's credit over many steps) is one
// message here. Owns itself from Start until OnDone has run.
class SubscribeCall final : public grpc::ClientReadReactor<v1::RecordBatch> {
 public:
  using OnRecord = std::function<void(const v1::Record&)>;
  using OnEnd = std::function<void(const grpc::Status&)>;

  static std::shared_ptr<SubscribeCall> Start(const RelayContext& context, const std::string& token,
                                              v1::SubscribeRequest request, OnRecord on_record,
                                              OnEnd on_end) {
    std::shared_ptr<SubscribeCall> call(new SubscribeCall(context.calls, std::move(request),
                                                          std::move(on_record), std::move(on_end)));
    context.calls->Add();
    call->self_ = call;
    call->stub_ = v1::Live::NewStub(context.channel);
    call->ctx_.AddMetadata("authorization", "Bearer " + token);
    call->stub_->async()->SubscribeBatches(&call->ctx_, &call->request_, call.get());
    call->StartRead(&call->in_);
    call->StartCall();
    return call;
  }

  void Cancel() { ctx_.TryCancel(); }

  void OnReadDone(bool ok) override {
    if (!ok) return;  // OnDone follows with the status
    for (const v1::Record& r : in_.records()) on_record_(r);
    StartRead(&in_);
  }

  void OnDone(const grpc::Status& status) override {
    on_end_(status);
    std::shared_ptr<CallTracker> calls = calls_;
    std::shared_ptr<SubscribeCall> keep = std::move(self_);
    keep.reset();
    calls->Done();
  }

 private:
  SubscribeCall(std::shared_ptr<CallTracker> calls, v1::SubscribeRequest request,
                OnRecord on_record, OnEnd on_end)
      : calls_(std::move(calls)),
        request_(std::move(request)),
        on_record_(std::move(on_record)),
        on_end_(std::move(on_end)) {}

  const std::shared_ptr<CallTracker> calls_;
  const v1::SubscribeRequest request_;
  const OnRecord on_record_;
  const OnEnd on_end_;
  std::unique_ptr<v1::Live::Stub> stub_;
  grpc::ClientContext ctx_;
  v1::RecordBatch in_;
  std::shared_ptr<SubscribeCall> self_;
};

class LiveRelay final : public Relay, public std::enable_shared_from_this<LiveRelay> {
 public:
  LiveRelay(const RelayContext& context, std::shared_ptr<PageSocket> page)
      : context_(context), page_(std::move(page)) {}

  void OnPageMessage(std::string text) override {
    auto request = ParseSubscribePageMessage(text);
    std::unique_lock<std::mutex> lock(mu_);
    if (closed_) return;
    if (starting_) return;  // one subscription per connection; later messages are ignored
    if (!request.ok()) {
      closed_ = true;
      lock.unlock();
      page_->Send(EndToPage(static_cast<int>(grpc::StatusCode::INVALID_ARGUMENT),
                            std::string(request.status().message())));
      page_->Close();
      return;
    }
    v1::SubscribeRequest sub;
    sub.set_session_id(request->session_id);
    sub.set_from_sequence(request->from_sequence);
    // Everything the live view draws; probes (one a second per client) and
    // calibration moves and answers are left to the ledger.
    for (v1::RecordKind k :
         {v1::RECORD_KIND_SESSION_EVENT, v1::RECORD_KIND_CLIENT_EVENT, v1::RECORD_KIND_FEEDBACK,
          v1::RECORD_KIND_STEP, v1::RECORD_KIND_CLOCK_MODEL, v1::RECORD_KIND_MARKER,
          v1::RECORD_KIND_CREDIT, v1::RECORD_KIND_LABEL, v1::RECORD_KIND_UNMATCHED,
          v1::RECORD_KIND_KERNEL, v1::RECORD_KIND_CALIBRATION}) {
      sub.add_kinds(k);
    }
    starting_ = true;
    lock.unlock();
    std::weak_ptr<LiveRelay> weak = weak_from_this();
    std::shared_ptr<PageSocket> page = page_;
    std::shared_ptr<SubscribeCall> call = SubscribeCall::Start(
        context_, request->token, std::move(sub),
        [page](const v1::Record& r) { page->Send(RecordToPage(r)); },
        [weak](const grpc::Status& s) {
          if (auto self = weak.lock()) self->ServerEnded(s);
        });
    lock.lock();
    call_ = call;
    const bool closed = closed_;
    lock.unlock();
    if (closed) call->Cancel();
    SendSummary(request->token, request->session_id);
  }

  void OnPageClosed() override {
    std::shared_ptr<SubscribeCall> call;
    {
      std::lock_guard<std::mutex> lock(mu_);
      closed_ = true;
      call = call_;
    }
    if (call) call->Cancel();
  }

 private:
  // The session's summary (title, counts, connected clients), once; the
  // records that follow keep the page current.
  void SendSummary(const std::string& token, const std::string& session_id) {
    struct Pending {
      std::unique_ptr<v1::SessionAdmin::Stub> stub;
      grpc::ClientContext ctx;
      v1::GetSessionRequest request;
      v1::SessionSummary response;
    };
    auto p = std::make_shared<Pending>();
    p->stub = v1::SessionAdmin::NewStub(context_.channel);
    p->ctx.AddMetadata("authorization", "Bearer " + token);
    p->ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(10));
    p->request.set_session_id(session_id);
    std::shared_ptr<PageSocket> page = page_;
    std::shared_ptr<CallTracker> calls = context_.calls;
    calls->Add();
    p->stub->async()->GetSession(&p->ctx, &p->request, &p->response,
                                 [p, page, calls](grpc::Status s) {
                                   // A refusal is said by the Subscribe call's end.
                                   if (s.ok()) page->Send(SummaryToPage(p->response));
                                   calls->Done();
                                 });
  }

  void ServerEnded(const grpc::Status& status) {
    {
      std::lock_guard<std::mutex> lock(mu_);
      closed_ = true;
    }
    page_->Send(EndToPage(static_cast<int>(status.error_code()),
                          status.ok() ? "the session's records end here" : status.error_message()));
    page_->Close();
  }

  const RelayContext context_;
  const std::shared_ptr<PageSocket> page_;
  std::mutex mu_;
  bool closed_ = false;                  // GUARDED_BY(mu_)
  bool starting_ = false;                // GUARDED_BY(mu_)
  std::shared_ptr<SubscribeCall> call_;  // GUARDED_BY(mu_)
};

}  // namespace

void CallTracker::Add() {
  std::lock_guard<std::mutex> lock(mu_);
  ++open_;
}

void CallTracker::Done() {
  std::lock_guard<std::mutex> lock(mu_);
  if (--open_ == 0) cv_.notify_all();
}

bool CallTracker::WaitIdle(Duration timeout) {
  std::unique_lock<std::mutex> lock(mu_);
  return cv_.wait_for(lock, std::chrono::nanoseconds(timeout.nanos()),
                      [this] { return open_ == 0; });
}

int CallTracker::open() const {
  std::lock_guard<std::mutex> lock(mu_);
  return open_;
}

std::shared_ptr<Relay> MakeTrainRelay(const RelayContext& context, std::shared_ptr<PageSocket> page,
                                      std::string user_agent) {
  return std::make_shared<TrainRelay>(context, std::move(page), std::move(user_agent));
}

std::shared_ptr<Relay> MakeLiveRelay(const RelayContext& context,
                                     std::shared_ptr<PageSocket> page) {
  return std::make_shared<LiveRelay>(context, std::move(page));
}

}  // namespace tickmark::web

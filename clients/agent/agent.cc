#include "clients/agent/agent.h"

#include "clients/common/channel.h"
#include "clients/common/client_id.h"
#include "clients/common/token.h"
#include "server/base/strings.h"
// Header-only: the one absl::Status <-> grpc::Status mapping.
#include "server/rpc/status.h"

namespace tickmark::agent {

namespace v1 = tickmark::v1;

absl::StatusOr<std::unique_ptr<Agent>> Agent::Connect(const Options& options) {
  auto creds = client::ChooseCredentials({options.server, options.insecure, options.ca_file});
  if (!creds.ok()) return creds.status();
  std::string token = options.token;
  if (token.empty()) {
    auto read = client::ReadToken({options.token_file, ""});
    if (!read.ok()) return read.status();
    token = read->value;
  }
  std::unique_ptr<Agent> agent(new Agent());
  agent->token_ = token;
  agent->clock_ = options.clock != nullptr ? options.clock : &agent->system_clock_;
  agent->channel_ = grpc::CreateChannel(options.server, creds->credentials);

  client::StreamOptions so;
  so.target = options.server;
  so.token = token;
  so.client_id =
      options.client_id.empty() ? client::DefaultClientId("agent", "cpp") : options.client_id;
  so.source = {v1::SOURCE_KIND_SCRIPT, options.description, "tickmark-agent-cpp 0.1"};
  so.credentials = creds->credentials;
  so.clock = agent->clock_;
  so.send_realtime = options.send_realtime;
  so.discipline = options.discipline;
  so.hello_timeout = Duration::Nanos(
      std::chrono::duration_cast<std::chrono::nanoseconds>(options.hello_timeout).count());
  // The first welcome or permanent failure; the callback outlives this call.
  struct FirstState {
    std::mutex mu;
    std::condition_variable cv;
    bool settled = false;
    client::StreamStatus status;
  };
  auto first = std::make_shared<FirstState>();
  client::AgentClient::Callbacks callbacks;
  callbacks.on_state = [first](const client::StreamStatus& st) {
    std::lock_guard<std::mutex> lock(first->mu);
    if (first->settled) return;
    if (st.state == client::StreamState::kConnected || st.state == client::StreamState::kFailed) {
      first->status = st;
      first->settled = true;
      first->cv.notify_all();
    }
  };
  if (absl::Status s = agent->stream_.Connect(so, callbacks); !s.ok()) return s;
  client::StreamStatus st;
  {
    std::unique_lock<std::mutex> lock(first->mu);
    if (!first->cv.wait_for(lock, options.connect_timeout, [&] { return first->settled; })) {
      first->settled = true;  // later state changes are the stream's business
      return absl::DeadlineExceededError(Cat("no welcome from tickmarkd at ", options.server,
                                             " within ", options.connect_timeout.count(), " ms"));
    }
    st = first->status;
  }
  if (st.state == client::StreamState::kFailed) return st.last_error;
  agent->session_id_ = st.session_id;
  agent->name_ = st.subject;
  return agent;
}

Agent::~Agent() { Close(std::chrono::milliseconds(2000)).IgnoreError(); }

int64_t Agent::NowNanos() const { return clock_->NowNanos(); }

absl::StatusOr<uint64_t> Agent::Publish(Step step) {
  v1::StepMessage m;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (step.step_id == 0) step.step_id = next_step_id_;
    next_step_id_ = std::max(next_step_id_, step.step_id + 1);
  }
  m.set_step_id(step.step_id);
  m.set_episode(step.episode);
  m.set_start_agent_ns(step.start_ns != 0 ? step.start_ns : clock_->NowNanos());
  m.set_end_agent_ns(step.end_ns);
  m.set_action(std::move(step.action));
  m.set_state(std::move(step.state));
  for (float f : step.features) m.add_features(f);
  if (absl::Status s = stream_.Send(std::move(m)); !s.ok()) return s;
  return step.step_id;
}

absl::Status Agent::Flush(std::chrono::milliseconds timeout) {
  return stream_.Flush(std::chrono::steady_clock::now() + timeout);
}

absl::Status Agent::Close(std::chrono::milliseconds timeout) {
  return stream_.Close(std::chrono::steady_clock::now() + timeout);
}

std::unique_ptr<Subscription> Agent::Subscribe(SubscribeOptions options) {
  return std::unique_ptr<Subscription>(
      new Subscription(channel_, token_, session_id_, std::move(options)));
}

Subscription::Subscription(std::shared_ptr<grpc::Channel> channel, std::string token,
                           std::string session_id, SubscribeOptions options)
    : channel_(std::move(channel)),
      token_(std::move(token)),
      session_id_(std::move(session_id)),
      options_(std::move(options)),
      received_(options_.from_sequence > 0 ? options_.from_sequence - 1 : 0),
      position_(received_) {
  reader_ = std::thread([this] { Run(); });
}

Subscription::~Subscription() { Close(); }

void Subscription::Close() {
  {
    std::lock_guard<std::mutex> lock(mu_);
    closing_ = true;
    if (current_ != nullptr) current_->TryCancel();
  }
  cv_.notify_all();
  if (reader_.joinable()) reader_.join();
}

void Subscription::Run() {
  auto stub = v1::Live::NewStub(channel_);
  std::chrono::milliseconds backoff(100);
  bool batches = true;  // SubscribeBatches (contract 1.1) until the server says it has none
  while (true) {
    v1::SubscribeRequest req;
    grpc::ClientContext ctx;
    {
      std::lock_guard<std::mutex> lock(mu_);
      if (closing_) break;
      req.set_session_id(session_id_);
      req.set_from_sequence(received_ + 1);
      req.set_stop_at_end(!options_.follow);
      for (auto k : options_.kinds) req.add_kinds(k);
      ctx.AddMetadata("authorization", "Bearer " + token_);
      // Lets a load balancer route by session (several instances); any
      // instance serves a subscription, so no owner needs to be followed.
      ctx.AddMetadata(rpc::kSessionMetadata, session_id_);
      current_ = &ctx;
    }
    // Takes one message's records (under the lock: Next sees them together).
    auto keep = [this, &backoff](auto begin, auto end) {
      std::lock_guard<std::mutex> lock(mu_);
      for (auto it = begin; it != end; ++it) {
        if (it->sequence() <= received_) continue;  // never twice across a resume
        received_ = it->sequence();
        queue_.push_back(std::move(*it));
      }
      cv_.notify_all();
      backoff = std::chrono::milliseconds(100);
    };
    grpc::Status s;
    if (batches) {
      auto reader = stub->SubscribeBatches(&ctx, req);
      v1::RecordBatch b;
      while (reader->Read(&b)) keep(b.mutable_records()->begin(), b.mutable_records()->end());
      s = reader->Finish();
    } else {
      auto reader = stub->Subscribe(&ctx, req);
      v1::Record r;
      while (reader->Read(&r)) keep(&r, &r + 1);
      s = reader->Finish();
    }
    std::unique_lock<std::mutex> lock(mu_);
    current_ = nullptr;
    if (closing_) break;
    if (s.ok()) {
      break;  // the server ended it: the end of a closed session, or follow=false
    }
    if (batches && s.error_code() == grpc::StatusCode::UNIMPLEMENTED) {
      batches = false;  // a server older than contract 1.1: one record per message
      continue;
    }
    // Broken or ended by the server: resume. CANCELLED here (Close was not
    // called, see above) comes from the other side — a server shutting down
    // cancels its open calls — so it is not the client's own doing.
    const auto code = s.error_code();
    if (code != grpc::StatusCode::UNAVAILABLE && code != grpc::StatusCode::INTERNAL &&
        code != grpc::StatusCode::UNKNOWN && code != grpc::StatusCode::RESOURCE_EXHAUSTED &&
        code != grpc::StatusCode::CANCELLED && code != grpc::StatusCode::ABORTED) {
      status_ = rpc::FromGrpc(s);
      break;
    }
    // Broken connection: wait, then resume right after the last record.
    cv_.wait_for(lock, backoff, [this] { return closing_; });
    backoff = std::min(backoff * 2, std::chrono::milliseconds(5000));
  }
  std::lock_guard<std::mutex> lock(mu_);
  done_ = true;
  cv_.notify_all();
}

std::optional<v1::Record> Subscription::Next(std::chrono::milliseconds timeout) {
  std::unique_lock<std::mutex> lock(mu_);
  cv_.wait_for(lock, timeout, [this] { return !queue_.empty() || done_; });
  if (queue_.empty()) return std::nullopt;
  v1::Record r = std::move(queue_.front());
  queue_.pop_front();
  position_ = r.sequence();
  return r;
}

bool Subscription::done() const {
  std::lock_guard<std::mutex> lock(mu_);
  return done_ && queue_.empty();
}

absl::Status Subscription::status() const {
  std::lock_guard<std::mutex> lock(mu_);
  return status_;
}

uint64_t Subscription::position() const {
  std::lock_guard<std::mutex> lock(mu_);
  return position_;
}

}  // namespace tickmark::agent

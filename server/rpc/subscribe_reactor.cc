#include "server/rpc/subscribe_reactor.h"

#include "server/ops/server_metrics.h"
#include "server/rpc/admin_service.h"
#include "server/rpc/status.h"

namespace tickmark::rpc {

namespace v1 = tickmark::v1;

template <class Out>
BasicSubscribeReactor<Out>::BasicSubscribeReactor(LiveService* service,
                                                  grpc::CallbackServerContext* ctx,
                                                  const v1::SubscribeRequest& req)
    : service_(service),
      ctx_(ctx),
      req_(req),
      strand_(std::make_shared<Strand>(&service->pool())) {}

template <class Out>
void BasicSubscribeReactor<Out>::Post(std::function<void(BasicSubscribeReactor&)> fn) {
  std::shared_ptr<BasicSubscribeReactor> self = this->weak_from_this().lock();
  if (!self) return;
  strand_->Post([self = std::move(self), fn = std::move(fn)] { fn(*self); });
}

template <class Out>
void BasicSubscribeReactor<Out>::Start(const absl::Status& admitted, std::string peer_host) {
  self_ = this->shared_from_this();
  peer_host_ = std::move(peer_host);
  const auto& md = ctx_->client_metadata();
  if (auto it = md.find("authorization"); it != md.end()) {
    metadata_secret_ =
        std::string(BearerSecret(std::string_view(it->second.data(), it->second.size())));
  }
  if (!admitted.ok()) {
    finished_ = true;
    this->Finish(ToGrpc(admitted));
    return;
  }
  admitted_ = true;
  ops::StreamOpened(ops::StreamRole::kSubscriber);
  Post([](BasicSubscribeReactor& r) { r.Begin(); });
}

template <class Out>
void BasicSubscribeReactor<Out>::Begin() {
  if (finished_) return;
  auto who = service_->auth()->Authenticate(metadata_secret_);
  if (!who.ok()) return FinishNow(ToGrpc(who.status()));
  principal_ = *who;
  if (absl::Status s = Authorize(principal_, req_.session_id(),
                                 {v1::ROLE_ADMIN, v1::ROLE_AGENT, v1::ROLE_OBSERVER});
      !s.ok()) {
    return FinishNow(ToGrpc(s));
  }
  auto runtime = service_->hub()->Get(req_.session_id());
  if (!runtime.ok()) {
    // Owned by another instance: read it from the shared database here
    // rather than sending the subscriber away.
    if (!absl::IsUnavailable(runtime.status()) ||
        service_->hub()->OwnerHint(req_.session_id()).empty()) {
      return FinishNow(ToGrpc(runtime.status()));
    }
    remote_ = true;
  } else {
    runtime_ = *runtime;
  }
  for (int k : req_.kinds()) kinds_.insert(k);
  next_ = std::max<uint64_t>(1, req_.from_sequence());
  ledger::Ledger* ledger = service_->hub()->ledger();
  bool follow = !req_.stop_at_end();
  if (remote_) {
    auto row = ledger->GetSession(req_.session_id());
    if (!row.ok()) return FinishNow(ToGrpc(row.status()));
    if (follow) {
      token_id_ = principal_.token_id;
      service_->hub()->Watch(req_.session_id(), this);
      registered_ = true;
    } else {
      stop_after_ = row->last_sequence;
    }
    return Pump();
  }
  if (follow && !runtime_->open()) {
    // Closed, or closing: the ledger row is marked closed only after the
    // "closed" record has committed. Until then follow up to that record
    // (Pump stops there), so a follower that arrives while the session
    // closes still gets the final labels.
    auto row = ledger->GetSession(req_.session_id());
    follow = row.ok() && row->open;
  }
  if (!follow) {
    stop_after_ = ledger->CommittedSequence(req_.session_id());
  } else {
    token_id_ = principal_.token_id;
    runtime_->AddSink(this);
    runtime_->AddStream(this);
    registered_ = true;
  }
  Pump();
}

template <class Out>
void BasicSubscribeReactor<Out>::End(const grpc::Status& status) {
  if (status.error_code() == grpc::StatusCode::FAILED_PRECONDITION) {
    // Session closing: keep delivering until its "closed" record has gone
    // out (Pump), so a follower sees the whole session.
    return;
  }
  Post([status](BasicSubscribeReactor& r) { r.FinishNow(status); });
}

template <class Out>
void BasicSubscribeReactor<Out>::OnCommitted(const std::vector<v1::Record>& records) {
  {
    std::lock_guard<std::mutex> lock(inbox_mu_);
    if (inbox_.size() + records.size() <= service_->options().subscriber_buffer) {
      inbox_.insert(inbox_.end(), records.begin(), records.end());
    } else {  // dropped: Pump refills the gap from the ledger
      ops::CountSubscriberOverflow(records.size());
    }
    ops::ObserveSubscriberBacklog(inbox_.size());
  }
  // Remote: an empty batch is a wake-up from the database; always pump (a
  // wake-up during a read must not be lost; PostPump runs once).
  if (idle_.load() || remote_) PostPump();
}

template <class Out>
void BasicSubscribeReactor<Out>::PostPump() {
  if (pump_posted_.exchange(true)) return;
  Post([](BasicSubscribeReactor& r) {
    r.pump_posted_.store(false);
    r.Pump();
  });
}

template <class Out>
void BasicSubscribeReactor<Out>::OnWriteDone(bool ok) {
  Post([ok](BasicSubscribeReactor& r) {
    r.writing_ = false;
    if constexpr (kBatches) {
      r.current_.clear_records();
      r.batch_bytes_ = 0;
    }
    if (ok) r.Pump();
  });
}

template <class Out>
void BasicSubscribeReactor<Out>::OnCancel() {
  Post([](BasicSubscribeReactor& r) { r.FinishNow(grpc::Status::CANCELLED); });
}

template <class Out>
void BasicSubscribeReactor<Out>::OnDone() {
  Post([](BasicSubscribeReactor& r) { r.Cleanup(); });
}

template <class Out>
void BasicSubscribeReactor<Out>::Cleanup() {
  if (registered_ && remote_) {
    service_->hub()->Unwatch(req_.session_id(), this);
  } else if (registered_) {
    runtime_->RemoveSink(this);
    runtime_->RemoveStream(this);
  }
  if (admitted_) {
    service_->admission().Release(peer_host_);
    ops::StreamClosed(ops::StreamRole::kSubscriber);
  }
  self_.reset();  // the closure running this still holds a reference
}

// Finds the record with sequence next_: from the replay chunk, the live
// inbox, or a fresh ledger read.
template <class Out>
std::optional<v1::Record> BasicSubscribeReactor<Out>::Next() {
  while (!replay_.empty() && replay_.front().sequence() < next_) replay_.pop_front();
  if (!replay_.empty() && replay_.front().sequence() == next_) {
    v1::Record r = std::move(replay_.front());
    replay_.pop_front();
    return r;
  }
  {
    std::lock_guard<std::mutex> lock(inbox_mu_);
    while (!inbox_.empty() && inbox_.front().sequence() < next_) inbox_.pop_front();
    if (!inbox_.empty() && inbox_.front().sequence() == next_) {
      v1::Record r = std::move(inbox_.front());
      inbox_.pop_front();
      return r;
    }
  }
  ledger::Ledger* ledger = service_->hub()->ledger();
  if (remote_ || ledger->CommittedSequence(req_.session_id()) >= next_) {
    auto chunk = ledger->Read(req_.session_id(), next_, 512);
    if (!chunk.ok()) {
      FinishNow(ToGrpc(chunk.status()));
      return std::nullopt;
    }
    replay_.assign(chunk->begin(), chunk->end());
    if (!replay_.empty() && replay_.front().sequence() == next_) {
      v1::Record r = std::move(replay_.front());
      replay_.pop_front();
      return r;
    }
  }
  return std::nullopt;
}

template <class Out>
void BasicSubscribeReactor<Out>::Pump() {
  if (writing_ || finished_ || (!runtime_ && !remote_)) return;
  while (true) {
    if (next_ > stop_after_) {
      if constexpr (kBatches) {
        if (current_.records_size() > 0) return Write();
      }
      return FinishNow(grpc::Status::OK);
    }
    std::optional<v1::Record> r = Next();
    if (finished_) return;
    if (!r) {
      if constexpr (kBatches) {
        // Nothing more ready: send what was gathered; the next Pump (after
        // the write) waits for commits or ends the stream.
        if (current_.records_size() > 0) return Write();
      }
      if (stop_after_ != kFollow) {
        // Nothing more is coming.
        return FinishNow(grpc::Status::OK);
      }
      idle_.store(true);
      // A commit may have landed between the check and idle_ = true.
      std::lock_guard<std::mutex> lock(inbox_mu_);
      if (inbox_.empty() || inbox_.front().sequence() > next_) return;
      idle_.store(false);
      continue;
    }
    idle_.store(false);
    next_ = r->sequence() + 1;
    if (r->has_session_event() && r->session_event().event() == v1::SessionEvent::KIND_CLOSED) {
      stop_after_ = r->sequence();
    }
    if (!kinds_.empty() && !kinds_.count(ledger::RecordKindOf(*r))) continue;
    if constexpr (kBatches) {
      batch_bytes_ += r->ByteSizeLong();
      *current_.add_records() = std::move(*r);
      if (current_.records_size() >= kMaxBatchRecords || batch_bytes_ >= kMaxBatchBytes) {
        return Write();
      }
    } else {
      current_ = std::move(*r);
      return Write();
    }
  }
}

template <class Out>
void BasicSubscribeReactor<Out>::Write() {
  writing_ = true;
  this->StartWrite(&current_);
}

template <class Out>
void BasicSubscribeReactor<Out>::FinishNow(const grpc::Status& status) {
  if (finished_) return;
  finished_ = true;
  if (status.error_code() == grpc::StatusCode::UNAVAILABLE) {
    const std::string owner = service_->hub()->OwnerHint(req_.session_id());
    if (!owner.empty()) ctx_->AddTrailingMetadata(kOwnerMetadata, owner);
  }
  this->Finish(status);
}

template class BasicSubscribeReactor<v1::Record>;
template class BasicSubscribeReactor<v1::RecordBatch>;

}  // namespace tickmark::rpc

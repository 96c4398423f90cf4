#include "clients/cli/connection.h"

#include <filesystem>
#include <iostream>

namespace tickmark::cli {

namespace v1 = tickmark::v1;

void AddCommonFlags(CLI::App& app, CommonFlags* flags) {
  client::AddConnectionFlags(app, &flags->connection, {.client_id = false});
  app.add_option("--timeout", flags->timeout_s, "seconds to wait for the server")
      ->check(CLI::Range(int64_t{1}, int64_t{86400}))
      ->group("Connection");
}

std::optional<Connection> Connection::Open(const CommonFlags& flags) {
  auto creds = client::ChooseCredentials(flags.connection.channel);
  if (!creds.ok()) {
    std::cerr << "tickmark: " << creds.status().message() << "\n";
    return std::nullopt;
  }
  client::TokenFlags tf = flags.connection.token;
  auto token = client::ReadToken(tf);
  // Run from the folder where `./run server` keeps its state, the operator
  // needs no flag at all.
  if (!token.ok() && absl::IsNotFound(token.status()) &&
      std::filesystem::exists("var/operator.token")) {
    tf.token_file = "var/operator.token";
    token = client::ReadToken(tf);
  }
  if (!token.ok()) {
    std::cerr << "tickmark: no token: " << token.status().message()
              << "\n  (give --token-file, set TICKMARK_TOKEN, or run from the folder whose "
                 "var/operator.token tickmarkd wrote)\n";
    return std::nullopt;
  }
  for (const auto& w : token->warnings) std::cerr << "tickmark: warning: " << w << "\n";
  Connection conn;
  conn.channel_ = grpc::CreateChannel(flags.connection.channel.target, creds->credentials);
  conn.token_ = token->value;
  conn.timeout_ = std::chrono::seconds(flags.timeout_s);
  conn.server_ = flags.connection.channel.target;
  return conn;
}

std::unique_ptr<grpc::ClientContext> Connection::Context() const {
  auto ctx = StreamContext();
  ctx->set_deadline(std::chrono::system_clock::now() + timeout_);
  return ctx;
}

std::unique_ptr<grpc::ClientContext> Connection::StreamContext() const {
  auto ctx = std::make_unique<grpc::ClientContext>();
  ctx->AddMetadata("authorization", "Bearer " + token_);
  return ctx;
}

v1::SessionAdmin::Stub Connection::Admin() const { return v1::SessionAdmin::Stub(channel_); }

v1::Live::Stub Connection::Live() const { return v1::Live::Stub(channel_); }

grpc::Status Connection::ReadRecords(const v1::SubscribeRequest& req,
                                     const std::function<void(const v1::Record&)>& each) const {
  v1::Live::Stub stub(channel_);
  {
    auto ctx = StreamContext();
    auto reader = stub.SubscribeBatches(ctx.get(), req);
    v1::RecordBatch batch;
    while (reader->Read(&batch)) {
      for (const v1::Record& r : batch.records()) each(r);
    }
    grpc::Status s = reader->Finish();
    if (s.error_code() != grpc::StatusCode::UNIMPLEMENTED) return s;
  }
  auto ctx = StreamContext();
  auto reader = stub.Subscribe(ctx.get(), req);
  v1::Record r;
  while (reader->Read(&r)) each(r);
  return reader->Finish();
}

int Connection::Fail(const grpc::Status& s) const {
  std::cerr << "tickmark: ";
  switch (s.error_code()) {
    case grpc::StatusCode::UNAVAILABLE:
      std::cerr << "cannot reach tickmarkd at " << server_ << " (" << s.error_message()
                << ")\n  is the server running? ('./run server' starts one)\n";
      break;
    case grpc::StatusCode::UNAUTHENTICATED:
      std::cerr << "not authenticated: " << s.error_message() << "\n";
      break;
    case grpc::StatusCode::PERMISSION_DENIED:
      std::cerr << "not allowed: " << s.error_message() << "\n";
      break;
    case grpc::StatusCode::NOT_FOUND:
      std::cerr << "not found: " << s.error_message() << "\n";
      break;
    case grpc::StatusCode::DEADLINE_EXCEEDED:
      std::cerr << "no answer from tickmarkd at " << server_ << " within the --timeout ("
                << s.error_message() << ")\n";
      break;
    default:
      std::cerr << s.error_message() << " (gRPC code " << s.error_code() << ")\n";
  }
  return kExitError;
}

}  // namespace tickmark::cli

// The operator CLI's link to tickmarkd, written once for every command: the
// flags all commands share (the clients' connection flags plus --timeout),
// opening the channel with the operator's token, and turning a failed call
// into a clear message and exit code. CallAdmin is the whole skeleton of a
// command that makes one SessionAdmin call.
//
// Thread-compatible; used from main()'s thread.
#ifndef TICKMARK_CLIENTS_CLI_CONNECTION_H_
#define TICKMARK_CLIENTS_CLI_CONNECTION_H_

#include <grpcpp/grpcpp.h>

#include <CLI/CLI.hpp>
#include <chrono>
#include <functional>
#include <memory>
#include <optional>
#include <string>

#include "clients/common/connection_flags.h"
#include "server/base/flags.h"
#include "tickmark/v1/admin.grpc.pb.h"
#include "tickmark/v1/stream.grpc.pb.h"

namespace tickmark::cli {

inline constexpr int kExitOk = 0;
inline constexpr int kExitError = 1;  // the server refused or could not be reached
inline constexpr int kExitUsage = tickmark::kExitUsage;

// The flags every command takes.
struct CommonFlags {
  client::ConnectionFlags connection;  // --server, --token-file, --token, --ca-file, --insecure
  int64_t timeout_s = 30;              // --timeout: seconds to wait for one call
};

// Adds the common flags to `app`. Called for the root and for every
// command, all bound to one CommonFlags, so they may stand before or after
// the command words.
void AddCommonFlags(CLI::App& app, CommonFlags* flags);

class Connection {
 public:
  // Reads the token (--token-file, --token, $TICKMARK_TOKEN, else
  // ./var/operator.token) and opens a channel; on failure prints why and
  // returns nullopt.
  static std::optional<Connection> Open(const CommonFlags& flags);

  // For one unary call: the token and a deadline of --timeout.
  std::unique_ptr<grpc::ClientContext> Context() const;
  // For a stream: the token, no deadline.
  std::unique_ptr<grpc::ClientContext> StreamContext() const;
  tickmark::v1::SessionAdmin::Stub Admin() const;
  tickmark::v1::Live::Stub Live() const;
  // Runs a subscription to its end, calling `each` for every record in
  // order: SubscribeBatches (several records to a message), or Subscribe on a
  // server older than contract 1.1 (it answers UNIMPLEMENTED).
  grpc::Status ReadRecords(const tickmark::v1::SubscribeRequest& req,
                           const std::function<void(const tickmark::v1::Record&)>& each) const;

  // The token the calls carry (for handing on to a helper program, as
  // `tickmark report` does through $TICKMARK_TOKEN).
  const std::string& token() const { return token_; }

  // Prints what a failed call means for the operator; returns kExitError.
  int Fail(const grpc::Status& status) const;

 private:
  Connection() = default;

  std::shared_ptr<grpc::Channel> channel_;
  std::string token_;
  std::chrono::seconds timeout_{30};
  std::string server_;
};

// Connects, makes one SessionAdmin call and hands the response to `print`
// (which returns the exit code), or prints the failure.
template <typename Request, typename Response>
int CallAdmin(const CommonFlags& flags,
              grpc::Status (tickmark::v1::SessionAdmin::Stub::*method)(grpc::ClientContext*,
                                                                       const Request&, Response*),
              const Request& request, const std::function<int(const Response&)>& print) {
  auto conn = Connection::Open(flags);
  if (!conn) return kExitError;
  Response response;
  auto ctx = conn->Context();
  auto stub = conn->Admin();
  if (grpc::Status s = (stub.*method)(ctx.get(), request, &response); !s.ok()) {
    return conn->Fail(s);
  }
  return print(response);
}

}  // namespace tickmark::cli

#endif  // TICKMARK_CLIENTS_CLI_CONNECTION_H_

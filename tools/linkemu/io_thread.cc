#include "tools/linkemu/io_thread.h"

#include <future>

#include <boost/asio/post.hpp>

namespace tickmark::linkemu {

IoThread::~IoThread() { Stop(); }

void IoThread::Start() {
  work_.emplace(io_.get_executor());
  thread_ = std::thread([this] { io_.run(); });
}

void IoThread::RunSync(const std::function<void()>& fn) {
  if (!thread_.joinable()) {
    fn();
    return;
  }
  std::promise<void> done;
  boost::asio::post(io_, [&] {
    fn();
    done.set_value();
  });
  done.get_future().wait();
}

void IoThread::Stop() {
  if (!thread_.joinable()) return;
  work_.reset();
  io_.stop();
  thread_.join();
}

}  // namespace tickmark::linkemu

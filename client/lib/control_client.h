// Request/reply with slopecastd's control endpoint.
#pragma once

#include <chrono>
#include <memory>
#include <string>
#include <variant>

#include <zmq.hpp>

#include "slopecast/v1/control.pb.h"

namespace slopecast::client {

// The error call() returns when a signal interrupted the wait.
inline constexpr const char* kInterrupted = "interrupted by a signal";

class ControlClient {
 public:
  ControlClient(zmq::context_t& ctx, std::string endpoint);

  // One request, one reply. On timeout or a reply that does not parse, returns
  // the reason as a string (and resets the socket so the next call can go on).
  std::variant<v1::ControlReply, std::string> call(const v1::ControlRequest& request,
                                                   std::chrono::milliseconds timeout);

  // call() with a status request.
  std::variant<v1::ControlReply, std::string> status(std::chrono::milliseconds timeout);

  // Polls status until the daemon answers, total elapses, or a signal
  // arrives: the readiness check for scripts and tests. Returns the first
  // reply, or why not.
  std::variant<v1::ControlReply, std::string> wait_ready(std::chrono::milliseconds total);

 private:
  void reset();
  zmq::context_t& ctx_;
  std::string endpoint_;
  std::unique_ptr<zmq::socket_t> socket_;
};

}  // namespace slopecast::client

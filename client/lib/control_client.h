// Request/reply with slopecastd's control endpoint.
#pragma once

#include <chrono>
#include <memory>
#include <optional>
#include <string>
#include <variant>

#include <zmq.hpp>

#include "slopecast/v1/control.pb.h"

namespace slopecast::client {

// The error call() returns when a signal interrupted the wait.
inline constexpr const char* kInterrupted = "interrupted by a signal";

// A client's side of CURVE (a daemon with [security] on): the daemon's
// public key and this client's key pair, Z85 (daemon/io/curve_keys.h).
struct CurveClient {
  std::string server_public;
  std::string public_key;
  std::string secret_key;
};

// Sets a socket up as a CURVE client before it connects.
void apply_curve(zmq::socket_t& socket, const CurveClient& keys);

class ControlClient {
 public:
  ControlClient(zmq::context_t& ctx, std::string endpoint, std::optional<CurveClient> curve = std::nullopt);

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
  std::optional<CurveClient> curve_;
  std::unique_ptr<zmq::socket_t> socket_;
};

}  // namespace slopecast::client

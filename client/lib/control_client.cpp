#include "client/lib/control_client.h"

#include <algorithm>

#include "client/lib/interruptible_poll.h"

namespace slopecast::client {

void apply_curve(zmq::socket_t& socket, const CurveClient& keys) {
  socket.set(zmq::sockopt::curve_serverkey, keys.server_public);
  socket.set(zmq::sockopt::curve_publickey, keys.public_key);
  socket.set(zmq::sockopt::curve_secretkey, keys.secret_key);
}

ControlClient::ControlClient(zmq::context_t& ctx, std::string endpoint, std::optional<CurveClient> curve)
    : ctx_(ctx), endpoint_(std::move(endpoint)), curve_(std::move(curve)) {
  reset();
}

void ControlClient::reset() {
  // A REQ socket that sent and got no answer cannot send again; replace it.
  socket_ = std::make_unique<zmq::socket_t>(ctx_, zmq::socket_type::req);
  socket_->set(zmq::sockopt::linger, 0);
  if (curve_) apply_curve(*socket_, *curve_);
  socket_->connect(endpoint_);
}

std::variant<v1::ControlReply, std::string> ControlClient::call(const v1::ControlRequest& request,
                                                                std::chrono::milliseconds timeout) {
  const std::string bytes = request.SerializeAsString();
  if (!socket_->send(zmq::buffer(bytes), zmq::send_flags::dontwait)) {
    reset();
    return std::string("could not send the request to ") + endpoint_;
  }
  zmq::pollitem_t item{socket_->handle(), 0, ZMQ_POLLIN, 0};
  if (interruptible_poll(&item, 1, timeout) == PollResult::kInterrupted) {
    reset();
    return std::string(kInterrupted);
  }
  zmq::message_t m;
  if (!(item.revents & ZMQ_POLLIN) || !socket_->recv(m, zmq::recv_flags::dontwait)) {
    reset();
    return "no reply from " + endpoint_ + " within " + std::to_string(timeout.count()) +
           " ms (is slopecastd running with that control endpoint?)";
  }
  v1::ControlReply reply;
  if (!reply.ParseFromArray(m.data(), static_cast<int>(m.size())))
    return "the reply from " + endpoint_ + " does not parse as a slopecast.v1.ControlReply";
  return reply;
}

std::variant<v1::ControlReply, std::string> ControlClient::status(std::chrono::milliseconds timeout) {
  v1::ControlRequest req;
  req.mutable_status();
  return call(req, timeout);
}

std::variant<v1::ControlReply, std::string> ControlClient::wait_ready(std::chrono::milliseconds total) {
  const auto deadline = std::chrono::steady_clock::now() + total;
  for (;;) {
    const auto left = std::chrono::duration_cast<std::chrono::milliseconds>(
        deadline - std::chrono::steady_clock::now());
    auto r = status(std::clamp(left, std::chrono::milliseconds(1), std::chrono::milliseconds(200)));
    if (std::holds_alternative<v1::ControlReply>(r) || left.count() <= 200) return r;
    if (std::get<std::string>(r) == kInterrupted) return r;
  }
}

}  // namespace slopecast::client

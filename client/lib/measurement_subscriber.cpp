#include "client/lib/measurement_subscriber.h"

#include "client/lib/interruptible_poll.h"

namespace slopecast::client {

MeasurementSubscriber::MeasurementSubscriber(zmq::context_t& ctx, const std::string& endpoint,
                                             const std::optional<CurveClient>& curve)
    : socket_(ctx, zmq::socket_type::sub) {
  socket_.set(zmq::sockopt::linger, 0);
  if (curve) apply_curve(socket_, *curve);
  socket_.set(zmq::sockopt::rcvhwm, 10000);
  socket_.set(zmq::sockopt::subscribe, "");
  socket_.connect(endpoint);
}

std::optional<v1::Measurement> MeasurementSubscriber::receive(std::chrono::milliseconds timeout) {
  const auto deadline = std::chrono::steady_clock::now() + timeout;
  zmq::pollitem_t item{socket_.handle(), 0, ZMQ_POLLIN, 0};
  for (;;) {
    zmq::message_t m;
    if (socket_.recv(m, zmq::recv_flags::dontwait)) {
      if (m.more()) {  // a measurement is one part: skip anything else whole
        zmq::message_t rest;
        do (void)socket_.recv(rest);
        while (rest.more());
        ++malformed_;
        continue;
      }
      v1::Measurement out;
      if (m.size() > 0 && out.ParseFromArray(m.data(), static_cast<int>(m.size()))) return out;
      ++malformed_;
      continue;
    }
    const auto left = std::chrono::duration_cast<std::chrono::milliseconds>(
        deadline - std::chrono::steady_clock::now());
    if (left.count() <= 0) return std::nullopt;
    if (interruptible_poll(&item, 1, left) == PollResult::kInterrupted) return std::nullopt;
  }
}

}  // namespace slopecast::client

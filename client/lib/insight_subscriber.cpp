#include "client/lib/insight_subscriber.h"

#include "client/lib/interruptible_poll.h"

namespace slopecast::client {

InsightSubscriber::InsightSubscriber(zmq::context_t& ctx, const std::string& endpoint,
                                     const std::vector<std::string>& topics, const std::optional<CurveClient>& curve)
    : socket_(ctx, zmq::socket_type::sub) {
  socket_.set(zmq::sockopt::linger, 0);
  if (curve) apply_curve(socket_, *curve);
  if (topics.empty()) socket_.set(zmq::sockopt::subscribe, "");
  for (const auto& t : topics) socket_.set(zmq::sockopt::subscribe, t);
  socket_.connect(endpoint);
}

std::optional<InsightMessage> InsightSubscriber::receive(std::chrono::milliseconds timeout) {
  const auto deadline = std::chrono::steady_clock::now() + timeout;
  zmq::pollitem_t item{socket_.handle(), 0, ZMQ_POLLIN, 0};
  for (;;) {
    zmq::message_t topic;
    if (socket_.recv(topic, zmq::recv_flags::dontwait)) {
      if (!topic.more()) continue;
      zmq::message_t payload;
      (void)socket_.recv(payload);
      if (payload.more()) {  // more than two parts: not ours, skip it whole
        zmq::message_t rest;
        do (void)socket_.recv(rest);
        while (rest.more());
        continue;
      }
      return InsightMessage{topic.to_string(), payload.to_string()};
    }
    const auto left = std::chrono::duration_cast<std::chrono::milliseconds>(deadline - std::chrono::steady_clock::now());
    if (left.count() <= 0) return std::nullopt;
    if (interruptible_poll(&item, 1, left) == PollResult::kInterrupted) return std::nullopt;
  }
}

}  // namespace slopecast::client

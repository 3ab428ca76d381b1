// Receiving slopecastd's insight reports (proto/slopecast/v1/insight.proto):
// two-part messages, a topic and a protobuf.
#pragma once

#include <chrono>
#include <optional>
#include <string>
#include <vector>

#include <zmq.hpp>

#include "client/lib/control_client.h"

namespace slopecast::client {

struct InsightMessage {
  std::string topic;    // "modes", "turbulence", "noise", "shadow", "preview"
  std::string payload;  // the serialised message of that name
};

class InsightSubscriber {
 public:
  // Connects to the daemon's insight_out and subscribes to these topics
  // (all when empty).
  InsightSubscriber(zmq::context_t& ctx, const std::string& endpoint, const std::vector<std::string>& topics = {},
                    const std::optional<CurveClient>& curve = std::nullopt);
  // Next report, or nullopt on timeout or a signal. Malformed messages are
  // skipped.
  [[nodiscard]] std::optional<InsightMessage> receive(std::chrono::milliseconds timeout);

 private:
  zmq::socket_t socket_;
};

}  // namespace slopecast::client

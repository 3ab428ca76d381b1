// Receiving measurements from slopecastd.
#pragma once

#include <chrono>
#include <optional>
#include <string>

#include <zmq.hpp>

#include "client/lib/control_client.h"

#include "slopecast/v1/measurement.pb.h"

namespace slopecast::client {

class MeasurementSubscriber {
 public:
  // Connects to the daemon's measurements_out endpoint and subscribes to all.
  MeasurementSubscriber(zmq::context_t& ctx, const std::string& endpoint,
                        const std::optional<CurveClient>& curve = std::nullopt);

  // Next measurement, or nullopt when none arrives within timeout or a
  // signal interrupts the wait. A message
  // that does not parse is counted in malformed() and skipped.
  [[nodiscard]] std::optional<v1::Measurement> receive(std::chrono::milliseconds timeout);

  std::uint64_t malformed() const { return malformed_; }

 private:
  zmq::socket_t socket_;
  std::uint64_t malformed_ = 0;
};

}  // namespace slopecast::client

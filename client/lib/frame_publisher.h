// Publishing camera frames in the slopecast wire format (for camera adapters,
// the simulator and tests).
//
// The publisher binds an XPUB socket, so it can tell when a subscriber (the
// daemon) has connected: wait_for_subscriber() is the readiness handshake
// that lets a sender start without losing its first frames to ZeroMQ's
// "slow joiner" effect, instead of sleeping and hoping.
#pragma once

#include <chrono>
#include <cstddef>
#include <functional>
#include <span>
#include <string>
#include <string_view>

#include <zmq.hpp>

#include "slopecast/v1/frame.pb.h"

namespace slopecast::client {

class FramePublisher {
 public:
  // Binds endpoint. high_water_mark: frames queued per subscriber before
  // the oldest are dropped. Throws zmq::error_t if the bind fails.
  FramePublisher(zmq::context_t& ctx, const std::string& endpoint, int high_water_mark = 16);

  // True once at least one subscription has arrived, false on timeout or
  // when a signal interrupts the wait.
  [[nodiscard]] bool wait_for_subscriber(std::chrono::milliseconds timeout);
  // The same for n subscriptions (each subscriber subscribes once).
  [[nodiscard]] bool wait_for_subscribers(unsigned n, std::chrono::milliseconds timeout);

  // Sends header + pixels as one two-part message. Never blocks: returns
  // false if a subscriber's queue is full (the frame is dropped). With no
  // subscriber at all ZeroMQ discards the frame and this returns true.
  bool publish(const v1::FrameHeader& header, std::span<const std::byte> pixels);

  // Sends header + pixels, waiting for room in full subscriber queues
  // instead of dropping: nothing is lost between here and a subscriber that
  // keeps reading (ZeroMQ applies back-pressure through the connection).
  // Returns false only if keep_waiting() turns false while waiting.
  bool publish_waiting(const v1::FrameHeader& header, std::span<const std::byte> pixels,
                       const std::function<bool()>& keep_waiting);

  // The same with the header already serialised (a replay sends the bytes
  // it recorded, unchanged).
  bool publish_encoded(std::string_view header, std::span<const std::byte> pixels);
  bool publish_encoded_waiting(std::string_view header, std::span<const std::byte> pixels,
                               const std::function<bool()>& keep_waiting);

  // True once wait_for_subscriber() (or a later poll) has seen a subscription.
  bool has_subscriber() const { return have_subscriber_; }

  // Sends arbitrary parts as one message (tests use it for malformed frames).
  bool publish_parts(std::span<const std::string> parts);

 private:
  zmq::socket_t socket_;
  bool have_subscriber_ = false;
  unsigned subscriptions_ = 0;
  std::string header_buffer_;
};

// Fills the header fields every frame needs, contract_version included.
v1::FrameHeader make_frame_header(std::uint64_t seq, std::uint64_t camera_time_ns, int width,
                                  int height, v1::PixelType type);

}  // namespace slopecast::client

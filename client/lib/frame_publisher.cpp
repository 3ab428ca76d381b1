#include "client/lib/frame_publisher.h"

#include "client/lib/interruptible_poll.h"

namespace slopecast::client {

FramePublisher::FramePublisher(zmq::context_t& ctx, const std::string& endpoint, int high_water_mark)
    : socket_(ctx, zmq::socket_type::xpub) {
  socket_.set(zmq::sockopt::linger, 1000);
  socket_.set(zmq::sockopt::sndhwm, high_water_mark);
  // Without this a PUB socket drops silently at the high-water mark; with it
  // send() reports EAGAIN, so publish() can return false and callers count
  // the drop.
  socket_.set(zmq::sockopt::xpub_nodrop, 1);
  // Pass every subscription up, not only the first per topic, so that
  // wait_for_subscribers() can count subscribers (a recorder beside the
  // daemon, say).
  socket_.set(zmq::sockopt::xpub_verbose, 1);
  socket_.bind(endpoint);
}

bool FramePublisher::wait_for_subscriber(std::chrono::milliseconds timeout) { return wait_for_subscribers(1, timeout); }

bool FramePublisher::wait_for_subscribers(unsigned n, std::chrono::milliseconds timeout) {
  if (subscriptions_ >= n) return have_subscriber_ = true;
  zmq::pollitem_t item{socket_.handle(), 0, ZMQ_POLLIN, 0};
  const auto deadline = std::chrono::steady_clock::now() + timeout;
  while (subscriptions_ < n) {
    const auto left = std::chrono::duration_cast<std::chrono::milliseconds>(
        deadline - std::chrono::steady_clock::now());
    if (left.count() <= 0) return false;
    if (interruptible_poll(&item, 1, left) == PollResult::kInterrupted) return false;
    zmq::message_t m;
    while (socket_.recv(m, zmq::recv_flags::dontwait))
      if (m.size() >= 1 && static_cast<const unsigned char*>(m.data())[0] == 1) ++subscriptions_;
  }
  have_subscriber_ = true;
  return true;
}

bool FramePublisher::publish(const v1::FrameHeader& header, std::span<const std::byte> pixels) {
  header.SerializeToString(&header_buffer_);
  return publish_encoded(header_buffer_, pixels);
}

bool FramePublisher::publish_encoded(std::string_view header, std::span<const std::byte> pixels) {
  if (!socket_.send(zmq::const_buffer(header.data(), header.size()), zmq::send_flags::sndmore | zmq::send_flags::dontwait))
    return false;
  return socket_.send(zmq::const_buffer(pixels.data(), pixels.size()), zmq::send_flags::dontwait)
      .has_value();
}

bool FramePublisher::publish_waiting(const v1::FrameHeader& header, std::span<const std::byte> pixels,
                                     const std::function<bool()>& keep_waiting) {
  header.SerializeToString(&header_buffer_);
  return publish_encoded_waiting(header_buffer_, pixels, keep_waiting);
}

bool FramePublisher::publish_encoded_waiting(std::string_view header, std::span<const std::byte> pixels,
                                             const std::function<bool()>& keep_waiting) {
  zmq::pollitem_t item{socket_.handle(), 0, ZMQ_POLLOUT, 0};
  for (;;) {
    if (publish_encoded(header, pixels)) return true;
    if (!keep_waiting()) return false;
    // Room appears as the subscriber reads; a signal ends the wait early.
    (void)interruptible_poll(&item, 1, std::chrono::milliseconds(100));
  }
}

bool FramePublisher::publish_parts(std::span<const std::string> parts) {
  for (std::size_t i = 0; i < parts.size(); ++i) {
    auto flags = zmq::send_flags::dontwait;
    if (i + 1 < parts.size()) flags = flags | zmq::send_flags::sndmore;
    if (!socket_.send(zmq::buffer(parts[i]), flags)) return false;
  }
  return true;
}

v1::FrameHeader make_frame_header(std::uint64_t seq, std::uint64_t camera_time_ns, int width,
                                  int height, v1::PixelType type) {
  v1::FrameHeader h;
  h.set_contract_version(1);
  h.set_seq(seq);
  h.set_camera_time_ns(camera_time_ns);
  h.set_width_px(static_cast<std::uint32_t>(width));
  h.set_height_px(static_cast<std::uint32_t>(height));
  h.set_pixel_type(type);
  return h;
}

}  // namespace slopecast::client

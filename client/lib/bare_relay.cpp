#include "client/lib/bare_relay.h"

#include <cstring>

#include "slopecast/v1/frame.pb.h"

namespace slopecast::client {

BareRelay::BareRelay(zmq::context_t& ctx, const std::string& frames_endpoint, const std::string& replies_endpoint,
                     int frame_queue_depth)
    : frames_(ctx, zmq::socket_type::sub), replies_(ctx, zmq::socket_type::pub) {
  frames_.set(zmq::sockopt::linger, 0);
  replies_.set(zmq::sockopt::linger, 0);
  frames_.set(zmq::sockopt::rcvhwm, frame_queue_depth);
  frames_.set(zmq::sockopt::subscribe, "");
  replies_.bind(replies_endpoint);
  frames_.connect(frames_endpoint);
  thread_ = std::thread([this] { run(); });
}

BareRelay::~BareRelay() {
  stop_.store(true);
  thread_.join();
}

void BareRelay::run() {
  zmq::message_t header, payload;
  v1::FrameHeader h;
  zmq::pollitem_t item{frames_.handle(), 0, ZMQ_POLLIN, 0};
  while (!stop_.load()) {
    // A short poll so that the destructor is never kept waiting long. A
    // signal may land on this thread: EINTR is just another wake-up.
    try {
      if (zmq::poll(&item, 1, std::chrono::milliseconds(50)) == 0) continue;
    } catch (const zmq::error_t& e) {
      if (e.num() == EINTR) continue;
      throw;
    }
    while (frames_.recv(header, zmq::recv_flags::dontwait)) {
      bool more = header.more();
      while (more) {
        (void)frames_.recv(payload);  // the pixels: received whole, as the daemon does, not read
        more = payload.more();
      }
      if (!h.ParseFromArray(header.data(), static_cast<int>(header.size()))) continue;
      const std::uint64_t seq = h.seq();
      zmq::message_t reply(sizeof seq);
      std::memcpy(reply.data(), &seq, sizeof seq);
      (void)replies_.send(reply, zmq::send_flags::dontwait);
      relayed_.fetch_add(1);
    }
  }
}

}  // namespace slopecast::client

// A stand-in for slopecastd that measures nothing, to price the daemon's
// own work: it subscribes to frames exactly as the daemon does (a SUB
// socket connected to the frames endpoint, the header parsed as a
// FrameHeader) and answers each frame with an 8-byte message holding its
// seq, published on its own PUB socket. `slopecast roundtrip` times frames
// through it and through the daemon alternately, so that the daemon's
// latency is a ratio to the transport's in the same run.
#pragma once

#include <atomic>
#include <string>
#include <thread>

#include <zmq.hpp>

namespace slopecast::client {

class BareRelay {
 public:
  // Connects to frames_endpoint (a frame publisher binds it) and binds
  // replies_endpoint; runs on its own thread until destroyed. Throws
  // zmq::error_t if the bind fails.
  BareRelay(zmq::context_t& ctx, const std::string& frames_endpoint, const std::string& replies_endpoint,
            int frame_queue_depth);
  ~BareRelay();
  BareRelay(const BareRelay&) = delete;
  BareRelay& operator=(const BareRelay&) = delete;

  std::uint64_t relayed() const { return relayed_.load(); }

 private:
  void run();
  zmq::socket_t frames_, replies_;
  std::atomic<bool> stop_{false};
  std::atomic<std::uint64_t> relayed_{0};
  std::thread thread_;
};

}  // namespace slopecast::client

#include "daemon/app/daemon.h"

#include <sys/signalfd.h>
#include <unistd.h>

#include <spdlog/spdlog.h>

#include "daemon/core/frame_check.h"
#include "daemon/io/wire_codec.h"

namespace slopecast::app {

namespace {

constexpr auto kTickPeriod = std::chrono::seconds(1);
// Frames handled per poll wake-up before control and signals are looked at
// again, so a flood of frames cannot starve a stop request.
constexpr int kMaxFramesPerWake = 64;

std::uint64_t wall_ns() {
  return static_cast<std::uint64_t>(std::chrono::duration_cast<std::chrono::nanoseconds>(
                                        std::chrono::system_clock::now().time_since_epoch())
                                        .count());
}

// True for tcp:// endpoints that other hosts could reach.
bool reachable_off_host(const std::string& endpoint) {
  if (endpoint.rfind("tcp://", 0) != 0) return false;
  for (const char* local : {"tcp://127.", "tcp://localhost:", "tcp://[::1]:"})
    if (endpoint.rfind(local, 0) == 0) return false;
  return true;
}

float micros(std::chrono::steady_clock::duration d) {
  return std::chrono::duration<float, std::micro>(d).count();
}

std::span<const std::byte> bytes_of(const zmq::message_t& m) {
  return {static_cast<const std::byte*>(m.data()), m.size()};
}

}  // namespace

Daemon::Daemon(io::DaemonConfig config)
    : config_(std::move(config)),
      pipeline_(config_.pipeline),
      measurement_(pipeline_.make_measurement()),
      stats_(config_.latency_window_frames),
      started_(std::chrono::steady_clock::now()),
      ctx_(1),
      frames_(ctx_, zmq::socket_type::sub),
      measurements_(ctx_, zmq::socket_type::xpub),
      control_(ctx_, zmq::socket_type::rep) {
  for (zmq::socket_t* s : {&frames_, &measurements_, &control_}) s->set(zmq::sockopt::linger, 0);
  // Report every subscribe and unsubscribe, so we can count subscribers.
  measurements_.set(zmq::sockopt::xpub_verboser, 1);
  measurements_.set(zmq::sockopt::sndhwm, config_.measurement_queue_depth);
  for (const std::string* e : {&config_.endpoints.measurements_out, &config_.endpoints.control})
    if (reachable_off_host(*e))
      spdlog::warn("binding {} is reachable from other hosts, and slopecastd has no access control yet; "
                   "prefer 127.0.0.1 unless the network is trusted",
                   *e);
  try {
    measurements_.bind(config_.endpoints.measurements_out);
  } catch (const zmq::error_t& e) {
    spdlog::error("cannot bind measurements_out '{}': {}", config_.endpoints.measurements_out, e.what());
    throw;
  }
  try {
    control_.bind(config_.endpoints.control);
  } catch (const zmq::error_t& e) {
    spdlog::error("cannot bind control '{}': {}", config_.endpoints.control, e.what());
    throw;
  }
  frames_.set(zmq::sockopt::rcvhwm, config_.frame_queue_depth);
  // A sender that claims a frame far larger than the camera's is broken or
  // hostile: ZeroMQ drops its connection instead of buffering gigabytes. Row
  // padding up to 4x the packed width is allowed, plus 1 MiB for headers.
  const auto& cam = config_.pipeline.camera;
  const std::int64_t frame_bytes =
      static_cast<std::int64_t>(cam.width_px) * cam.height_px * core::bytes_per_pixel(cam.format);
  frames_.set(zmq::sockopt::maxmsgsize, 4 * frame_bytes + (1 << 20));
  control_.set(zmq::sockopt::maxmsgsize, std::int64_t{1} << 16);
  frames_.set(zmq::sockopt::subscribe, "");
  frames_.connect(config_.endpoints.frames_in);
  // Pre-size the outgoing message's repeated fields so the first frame does
  // not pay for their allocation either.
  io::encode_measurement(measurement_, io::MeasurementStamp{}, out_msg_);
}

Daemon::~Daemon() = default;

int Daemon::run(int signal_fd) {
  const auto& g = config_.pipeline.grid;
  spdlog::info("slopecastd {} ready: frames from {}, measurements on {}, control on {}; {}x{} {} camera, "
               "{}x{} subapertures of {} px, {} centroider, dark {}",
               kVersion, config_.endpoints.frames_in, config_.endpoints.measurements_out,
               config_.endpoints.control, config_.pipeline.camera.width_px,
               config_.pipeline.camera.height_px, core::pixel_format_name(config_.pipeline.camera.format),
               g.n_subap_x, g.n_subap_y, g.pitch_px, core::centroider_name(config_.pipeline.centroider),
               config_.dark_frame.empty() ? std::string("none") : config_.dark_frame.string());
  zmq::pollitem_t items[] = {
      {frames_.handle(), 0, ZMQ_POLLIN, 0},
      {control_.handle(), 0, ZMQ_POLLIN, 0},
      {measurements_.handle(), 0, ZMQ_POLLIN, 0},
      {nullptr, signal_fd, ZMQ_POLLIN, 0},
  };
  auto next_tick = std::chrono::steady_clock::now() + kTickPeriod;
  auto last_tick = std::chrono::steady_clock::now();
  for (;;) {
    const auto now = std::chrono::steady_clock::now();
    if (now >= next_tick) {
      tick(std::chrono::duration<double>(now - last_tick).count());
      last_tick = now;
      next_tick = now + kTickPeriod;
    }
    const auto wait = std::chrono::duration_cast<std::chrono::milliseconds>(next_tick - now);
    try {
      zmq::poll(items, 4, std::max(wait, std::chrono::milliseconds(1)));
    } catch (const zmq::error_t& e) {
      if (e.num() == EINTR) continue;
      throw;
    }
    if (items[3].revents & ZMQ_POLLIN) {
      signalfd_siginfo info{};
      if (read(signal_fd, &info, sizeof info) == sizeof info)
        spdlog::info("signal {} received, stopping", info.ssi_signo);
      break;
    }
    if (items[0].revents & ZMQ_POLLIN) handle_frames();
    if (items[1].revents & ZMQ_POLLIN) handle_control();
    if (items[2].revents & ZMQ_POLLIN) handle_subscriptions();
  }
  const LatencySummary lat = stats_.latency();
  spdlog::info("stopped after {:.1f} s: {} frames received, {} processed, {} rejected, {} missed, {} "
               "measurements published; latency median {:.1f} us, p99 {:.1f} us",
               std::chrono::duration<double>(std::chrono::steady_clock::now() - started_).count(),
               stats_.frames_received, stats_.frames_processed, stats_.rejected_total(),
               stats_.frames_missed, stats_.measurements_published, lat.median_us, lat.p99_us);
  return 0;
}

void Daemon::handle_frames() {
  for (int n = 0; n < kMaxFramesPerWake; ++n) {
    if (!frames_.recv(header_msg_, zmq::recv_flags::dontwait)) return;
    if (!header_msg_.more()) {
      handle_frame(header_msg_, nullptr, false);
      continue;
    }
    // The rest of a multipart message is already here (ZeroMQ delivers all
    // parts atomically), so these receives cannot block.
    (void)frames_.recv(payload_msg_);
    const bool extra = payload_msg_.more();
    for (bool more = extra; more; more = extra_msg_.more()) (void)frames_.recv(extra_msg_);
    handle_frame(header_msg_, &payload_msg_, extra);
  }
}

void Daemon::handle_frame(zmq::message_t& header, zmq::message_t* payload, bool extra_parts) {
  const auto t_received = std::chrono::steady_clock::now();
  const std::uint64_t received_ns = wall_ns();
  ++stats_.frames_received;
  if (!payload || extra_parts) return reject(core::FrameReject::kPartCount);
  const auto facts = io::decode_frame_header(bytes_of(header), header_scratch_);
  if (!facts) return reject(core::FrameReject::kBadHeader);
  const core::FrameCheckResult checked =
      core::check_frame(*facts, bytes_of(*payload), config_.pipeline.camera);
  if (!checked.image) return reject(checked.reject);
  stats_.note_seq(header_scratch_.seq());
  const auto t_checked = std::chrono::steady_clock::now();

  pipeline_.measure(*checked.image, measurement_);
  ++stats_.frames_processed;
  const auto t_measured = std::chrono::steady_clock::now();

  io::MeasurementStamp stamp;
  stamp.frame_seq = header_scratch_.seq();
  stamp.camera_time_ns = header_scratch_.camera_time_ns();
  stamp.received_time_ns = received_ns;
  stamp.n_subap_x = config_.pipeline.grid.n_subap_x;
  stamp.n_subap_y = config_.pipeline.grid.n_subap_y;
  stamp.centroider = config_.pipeline.centroider;
  stamp.check_us = micros(t_checked - t_received);
  stamp.centroid_us = micros(t_measured - t_checked);
  stamp.published_time_ns = wall_ns();
  io::encode_measurement(measurement_, stamp, out_msg_);
  zmq::message_t out(out_msg_.ByteSizeLong());
  out_msg_.SerializeWithCachedSizesToArray(static_cast<std::uint8_t*>(out.data()));
  if (measurements_.send(out, zmq::send_flags::dontwait)) ++stats_.measurements_published;
  stats_.record_latency_us(micros(std::chrono::steady_clock::now() - t_received));
}

void Daemon::reject(core::FrameReject reason) {
  stats_.count_reject(reason);
  // First occurrence of each reason is logged at once; later ones are summed
  // up by tick(), at most once per second per reason.
  if (stats_.rejected(reason) == 1) {
    spdlog::warn("rejected a frame: {} (further rejections are summarised once per second)",
                 core::frame_reject_name(reason));
    rejects_logged_[static_cast<std::size_t>(reason)] = 1;
  }
}

void Daemon::tick(double period_s) {
  stats_.tick(period_s);
  for (core::FrameReject r : core::kAllFrameRejects) {
    auto& logged = rejects_logged_[static_cast<std::size_t>(r)];
    const std::uint64_t total = stats_.rejected(r);
    if (total > logged) {
      spdlog::warn("rejected {} more frame(s): {} ({} in total)", total - logged,
                   core::frame_reject_name(r), total);
      logged = total;
    }
  }
}

void Daemon::handle_subscriptions() {
  zmq::message_t m;
  while (measurements_.recv(m, zmq::recv_flags::dontwait)) {
    if (m.size() < 1) continue;
    const auto kind = static_cast<const unsigned char*>(m.data())[0];
    if (kind == 1) ++subscribers_;
    else if (kind == 0 && subscribers_ > 0) --subscribers_;
  }
}

void Daemon::fill_status(v1::StatusReply& s) const {
  s.set_version(kVersion);
  s.set_uptime_s(std::chrono::duration<double>(std::chrono::steady_clock::now() - started_).count());
  s.set_frames_received(stats_.frames_received);
  s.set_frames_processed(stats_.frames_processed);
  s.set_frames_rejected(stats_.rejected_total());
  for (core::FrameReject r : core::kAllFrameRejects) {
    auto* c = s.add_rejected();
    c->set_reason(static_cast<v1::RejectReason>(static_cast<int>(r) + 1));
    c->set_reason_name(std::string(core::frame_reject_name(r)));
    c->set_count(stats_.rejected(r));
  }
  s.set_measurements_published(stats_.measurements_published);
  s.set_frames_missed(stats_.frames_missed);
  s.set_last_seq(stats_.last_seq);
  s.set_has_last_seq(stats_.has_last_seq);
  s.set_frame_rate_hz(stats_.frame_rate_hz);
  const LatencySummary lat = stats_.latency();
  s.set_latency_median_us(lat.median_us);
  s.set_latency_p99_us(lat.p99_us);
  s.set_latency_max_us(lat.max_us);
  s.set_latency_window_frames(lat.frames);
  s.set_measurement_subscribers(static_cast<std::uint32_t>(std::max(0, subscribers_)));
  const auto& p = config_.pipeline;
  s.set_width_px(p.camera.width_px);
  s.set_height_px(p.camera.height_px);
  s.set_n_subap_x(p.grid.n_subap_x);
  s.set_n_subap_y(p.grid.n_subap_y);
  s.set_pitch_px(p.grid.pitch_px);
  s.set_dark_loaded(!p.dark_adu.empty());
}

void Daemon::handle_control() {
  zmq::message_t req_msg;
  if (!control_.recv(req_msg, zmq::recv_flags::dontwait)) return;
  // A REP socket must answer every request part-set with exactly one reply;
  // drain any extra parts first.
  bool multipart = req_msg.more();
  while (req_msg.more()) (void)control_.recv(req_msg);
  v1::ControlRequest req;
  v1::ControlReply reply;
  if (multipart) {
    reply.set_error("control requests are single-part messages holding one slopecast.v1.ControlRequest");
  } else if (!req.ParseFromArray(req_msg.data(), static_cast<int>(req_msg.size()))) {
    reply.set_error("request does not parse as a slopecast.v1.ControlRequest");
  } else {
    switch (req.command_case()) {
      case v1::ControlRequest::kStatus:
        fill_status(*reply.mutable_status());
        reply.set_ok(true);
        break;
      case v1::ControlRequest::COMMAND_NOT_SET:
        reply.set_error("empty request: set one command (status)");
        break;
    }
  }
  const std::string bytes = reply.SerializeAsString();
  (void)control_.send(zmq::buffer(bytes), zmq::send_flags::dontwait);
}

}  // namespace slopecast::app

#include "daemon/app/daemon.h"

#include <signal.h>
#include <sys/signalfd.h>
#include <unistd.h>
#include <zmq.h>

#include <cstring>

#include <spdlog/spdlog.h>

#include "daemon/core/frame/frame_check.h"
#include "daemon/io/wire_codec.h"

namespace slopecast::app {

namespace {

constexpr auto kTickPeriod = std::chrono::seconds(1);
// Frames handled per poll wake-up before control and signals are looked at
// again, so a flood of frames cannot starve a stop request: at most this
// many, and none started after kMaxFramesTime has passed (a machine slower
// than the frame rate would otherwise hold control back for 64 frame times).
constexpr int kMaxFramesPerWake = 64;
constexpr auto kMaxFramesTime = std::chrono::milliseconds(10);

std::uint64_t wall_ns() {
  return static_cast<std::uint64_t>(std::chrono::duration_cast<std::chrono::nanoseconds>(
                                        std::chrono::system_clock::now().time_since_epoch())
                                        .count());
}

constexpr const char* kFramesMonitorEndpoint = "inproc://slopecastd-frames-monitor";

const char* stream_state_name(v1::StreamState s) {
  switch (s) {
    case v1::STREAM_STATE_WAITING: return "waiting";
    case v1::STREAM_STATE_OK: return "ok";
    case v1::STREAM_STATE_STALE: return "stale";
    default: return "?";
  }
}

float micros(std::chrono::steady_clock::duration d) {
  return std::chrono::duration<float, std::micro>(d).count();
}

// Everything but status and calibration show changes the daemon.
bool changes_something(const v1::ControlRequest& r) {
  if (r.has_status()) return false;
  if (r.has_calibration() && r.calibration().has_show()) return false;
  return true;
}

// The ZAP handler put the client's role in the connection's User-Id.
bool may_change(zmq::message_t& request) {
  const char* user = zmq_msg_gets(request.handle(), "User-Id");
  return user && std::string_view(user) == "change";
}

std::span<const std::byte> bytes_of(const zmq::message_t& m) {
  return {static_cast<const std::byte*>(m.data()), m.size()};
}

}  // namespace

Daemon::Daemon(io::DaemonConfig config)
    : config_(std::move(config)),
      pipeline_(config_.pipeline, config_.worker_threads),
      workers_(config_.worker_threads),
      calibration_(config_.calibration_dir,
                   !config_.calibration_set.empty() ? "set " + config_.calibration_set.string()
                   : !config_.layout_file.empty()   ? "table from " + config_.layout_file.string()
                                                    : std::string("regular grid"),
                   config_.lattice, config_.calibration_made),
      measurement_(pipeline_.make_measurement()),
      stats_(config_.latency_window_frames, config_.max_seq_jump),
      started_(std::chrono::steady_clock::now()),
      ctx_(1),
      frames_(ctx_, zmq::socket_type::sub),
      measurements_(ctx_, zmq::socket_type::xpub),
      control_(ctx_, zmq::socket_type::rep),
      frames_monitor_(ctx_, zmq::socket_type::pair),
      zap_(ctx_, zmq::socket_type::rep) {
  for (zmq::socket_t* s : {&frames_, &measurements_, &control_}) s->set(zmq::sockopt::linger, 0);
  // Report every subscribe and unsubscribe, so we can count subscribers.
  measurements_.set(zmq::sockopt::xpub_verboser, 1);
  measurements_.set(zmq::sockopt::sndhwm, config_.measurement_queue_depth);
  // What arrives on the measurement socket is subscriptions: measurements
  // carry no topic, so any prefix but "" is pointless. An oversized one
  // (8 MB took the daemon to 773 MB and kept it there) makes ZeroMQ drop
  // that connection instead.
  measurements_.set(zmq::sockopt::maxmsgsize, std::int64_t{kMaxSubscriptionBytes});
  for (const std::string* e : {&config_.endpoints.measurements_out, &config_.endpoints.control})
    if (io::reachable_off_host(*e) && !config_.curve)
      spdlog::warn("binding {} is reachable from other hosts without access control; prefer 127.0.0.1 "
                   "unless the network is trusted, or configure [security]",
                   *e);
  if (config_.curve) {
    // The ZAP handler must be bound before any connection can arrive.
    zap_.set(zmq::sockopt::linger, 0);
    zap_.bind("inproc://zeromq.zap.01");
    for (zmq::socket_t* s : {&measurements_, &control_}) {
      s->set(zmq::sockopt::curve_server, 1);
      s->set(zmq::sockopt::curve_secretkey, config_.server_keys.secret_z85);
      s->set(zmq::sockopt::zap_domain, "slopecast");
    }
    spdlog::info("access control on: CURVE with {} client key(s) allowed", config_.clients.size());
  }
  try {
    measurements_.bind(config_.endpoints.measurements_out);
  } catch (const zmq::error_t& e) {
    spdlog::error("cannot bind measurements_out '{}': {}", config_.endpoints.measurements_out, e.what());
    throw;
  }
  // Socket options take effect for connections made after they are set:
  // cap control requests before binding.
  control_.set(zmq::sockopt::maxmsgsize, kMaxControlRequestBytes);
  try {
    control_.bind(config_.endpoints.control);
  } catch (const zmq::error_t& e) {
    spdlog::error("cannot bind control '{}': {}", config_.endpoints.control, e.what());
    throw;
  }
  if (config_.insight.enabled) {
    zmq::socket_t insight(ctx_, zmq::socket_type::pub);
    insight.set(zmq::sockopt::linger, 0);
    insight.set(zmq::sockopt::sndhwm, 100);
    insight.set(zmq::sockopt::maxmsgsize, std::int64_t{kMaxSubscriptionBytes});
    if (config_.curve) {
      insight.set(zmq::sockopt::curve_server, 1);
      insight.set(zmq::sockopt::curve_secretkey, config_.server_keys.secret_z85);
      insight.set(zmq::sockopt::zap_domain, "slopecast");
    } else if (io::reachable_off_host(config_.endpoints.insight_out)) {
      spdlog::warn("binding {} is reachable from other hosts without access control", config_.endpoints.insight_out);
    }
    try {
      insight.bind(config_.endpoints.insight_out);
    } catch (const zmq::error_t& e) {
      spdlog::error("cannot bind insight_out '{}': {}", config_.endpoints.insight_out, e.what());
      throw;
    }
    insight_ = std::make_unique<InsightWorker>(std::move(insight), config_, pipeline_);
    if (config_.insight.shadow) shadow_ = config_.insight.shadow_centroider;
    spdlog::info("insight on {}: reports at {} Hz over {} frames{}{}", config_.endpoints.insight_out,
                 config_.insight.report_rate_hz, config_.insight.window_frames,
                 config_.insight.shadow ? ", shadow " + core::describe(config_.insight.shadow_centroider) : "",
                 config_.insight.preview_rate_hz > 0 ? fmt::format(", previews at {} Hz", config_.insight.preview_rate_hz)
                                                     : "");
  }
  frames_.set(zmq::sockopt::rcvhwm, config_.frame_queue_depth);
  // A part larger than this is never buffered: ZeroMQ drops the connection
  // instead, which the monitor below turns into a count and a reconnect.
  frames_.set(zmq::sockopt::maxmsgsize, config_.max_frame_bytes);
  frames_.set(zmq::sockopt::subscribe, "");
  if (zmq_socket_monitor(frames_.handle(), kFramesMonitorEndpoint, ZMQ_EVENT_DISCONNECTED) != 0)
    throw zmq::error_t();
  frames_monitor_.set(zmq::sockopt::linger, 0);
  frames_monitor_.connect(kFramesMonitorEndpoint);
  frames_.connect(config_.endpoints.frames_in);
  // Pre-size the outgoing message's repeated fields so the first frame does
  // not pay for their allocation either.
  io::encode_measurement(measurement_, io::MeasurementStamp{}, out_msg_);
  out_msg_.set_sensor_name(config_.sensor_name);
}

Daemon::~Daemon() { zmq_socket_monitor(frames_.handle(), nullptr, 0); }

int Daemon::run(int signal_fd) {
  const auto& g = pipeline_.settings().grid;
  spdlog::info("slopecastd {} ready: frames from {}, measurements on {}, control on {}; {}x{} {} camera, "
               "{}x{} subapertures of {} px, {} centroider, dark {}; {} path, {} kernels, {} thread(s)",
               kVersion, config_.endpoints.frames_in, config_.endpoints.measurements_out,
               config_.endpoints.control, config_.pipeline.camera.width_px,
               config_.pipeline.camera.height_px, core::pixel_format_name(config_.pipeline.camera.format),
               g.n_subap_x, g.n_subap_y, g.pitch_px, core::describe(config_.pipeline.centroider),
               config_.dark_frame.empty() ? std::string("none") : config_.dark_frame.string(),
               pipeline_.folded() ? "folded (integer sums)" : "float", core::simd_level_name(pipeline_.simd()),
               workers_.threads());
  for (const auto& w : config_.warnings) spdlog::warn("{}", w);
  zmq::pollitem_t items[] = {
      {frames_.handle(), 0, ZMQ_POLLIN, 0},
      {control_.handle(), 0, ZMQ_POLLIN, 0},
      {measurements_.handle(), 0, ZMQ_POLLIN, 0},
      {frames_monitor_.handle(), 0, ZMQ_POLLIN, 0},
      {nullptr, signal_fd, ZMQ_POLLIN, 0},
      {zap_.handle(), 0, ZMQ_POLLIN, 0},
  };
  const int n_items = config_.curve ? 6 : 5;
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
      zmq::poll(items, n_items, std::max(wait, std::chrono::milliseconds(1)));
    } catch (const zmq::error_t& e) {
      if (e.num() == EINTR) continue;
      throw;
    }
    if (items[4].revents & ZMQ_POLLIN) {
      bool stop = false;
      note_signal(signal_fd, stop);
      if (stop) break;
    }
    if (items[3].revents & ZMQ_POLLIN) handle_monitor();
    if (items[0].revents & ZMQ_POLLIN) handle_frames();
    if (items[1].revents & ZMQ_POLLIN) handle_control();
    if (items[2].revents & ZMQ_POLLIN) handle_subscriptions();
    if (n_items > 5 && (items[5].revents & ZMQ_POLLIN)) handle_zap();
  }
  const LatencySummary lat = stats_.latency();
  spdlog::info("stopped after {:.1f} s: {} frames received, {} processed, {} rejected, {} missed, {} "
               "measurements published; latency median {:.1f} us, p99 {:.1f} us",
               std::chrono::duration<double>(std::chrono::steady_clock::now() - started_).count(),
               stats_.frames_received, stats_.frames_processed, stats_.rejected_total(),
               stats_.frames_missed, stats_.measurements_published, lat.median_us, lat.p99_us);
  return 0;
}

void Daemon::note_signal(int signal_fd, bool& stop) {
  signalfd_siginfo info{};
  if (read(signal_fd, &info, sizeof info) != sizeof info) return;
  if (info.ssi_signo == SIGHUP) {
    spdlog::warn("SIGHUP received and ignored: slopecastd does not reload its config; restart it to apply "
                 "a change (SIGINT or SIGTERM stop it)");
    return;
  }
  spdlog::info("signal {} received, stopping", info.ssi_signo);
  stop = true;
}

void Daemon::handle_monitor() {
  // Each event is two parts: 6 bytes (uint16 event, uint32 value), then the endpoint.
  zmq::message_t event, endpoint;
  while (frames_monitor_.recv(event, zmq::recv_flags::dontwait)) {
    if (event.more()) (void)frames_monitor_.recv(endpoint);
    std::uint16_t id = 0;
    if (event.size() >= 2) std::memcpy(&id, event.data(), 2);
    if (id != ZMQ_EVENT_DISCONNECTED) continue;
    ++stats_.frame_connection_drops;
    spdlog::warn("the frames connection to {} was dropped (drop {}): a frame message part over "
                 "max_frame_bytes = {} bytes makes ZeroMQ close it, and so does a camera that stops; "
                 "reconnecting",
                 config_.endpoints.frames_in, stats_.frame_connection_drops, config_.max_frame_bytes);
    // Frames already queued from that connection are lost when it is
    // disconnected below: measure them first (a camera that sends its last
    // frames and exits must not lose them).
    while (handle_frames() > 0) {
    }
    // After a protocol error (an over-size part) libzmq does not reconnect by
    // itself; a fresh connect does. Disconnect first so that a session that
    // is still retrying is not doubled (which would deliver frames twice).
    try {
      frames_.disconnect(config_.endpoints.frames_in);
    } catch (const zmq::error_t&) {
      // ENOENT: the session is already gone, as after a protocol error.
    }
    frames_.connect(config_.endpoints.frames_in);
  }
}

int Daemon::handle_frames() {
  int n = 0;
  const auto until = std::chrono::steady_clock::now() + kMaxFramesTime;
  for (; n < kMaxFramesPerWake; ++n) {
    if (n > 0 && std::chrono::steady_clock::now() > until) return n;
    if (!frames_.recv(header_msg_, zmq::recv_flags::dontwait)) return n;
    has_last_image_ = false;  // payload_msg_ is about to be overwritten
    if (!header_msg_.more()) {
      handle_frame(header_msg_, nullptr, false);
      continue;
    }
    // The rest of a multipart message is already here (ZeroMQ delivers all
    // parts atomically), so these receives cannot block.
    (void)frames_.recv(payload_msg_);
    const bool extra = payload_msg_.more();
    for (bool more = extra; more; more = extra_msg_.more()) (void)frames_.recv(extra_msg_);
    // Newest wins: a frame with another already queued behind it is stale.
    if (config_.newest_frame_only && (frames_.get(zmq::sockopt::events) & ZMQ_POLLIN)) {
      ++stats_.frames_received;
      ++stats_.frames_skipped;
      // Its seq still counts for the stream's accounting, so that a skipped
      // frame is never reported as missed by the camera.
      if (!extra && io::decode_frame_header(bytes_of(header_msg_), header_scratch_))
        (void)stats_.note_seq(header_scratch_.seq());
      continue;
    }
    handle_frame(header_msg_, &payload_msg_, extra);
  }
  return n;
}

void Daemon::handle_frame(zmq::message_t& header, zmq::message_t* payload, bool extra_parts) {
  const auto t_received = std::chrono::steady_clock::now();
  const std::uint64_t received_ns = wall_ns();
  ++stats_.frames_received;
  core::RejectedFrame seen;
  seen.parts = payload ? (extra_parts ? 3 : 2) : 1;
  seen.header_bytes = header.size();
  seen.payload_bytes = payload ? payload->size() : 0;
  if (!payload || extra_parts) return reject(core::FrameReject::kPartCount, seen);
  const auto facts = io::decode_frame_header(bytes_of(header), header_scratch_);
  if (!facts) return reject(core::FrameReject::kBadHeader, seen);
  const core::FrameCheckResult checked =
      core::check_frame(*facts, bytes_of(*payload), config_.pipeline.camera);
  if (!checked.image) {
    seen.facts = *facts;
    return reject(checked.reject, seen);
  }
  const std::uint64_t previous_seq = stats_.last_seq;
  const SeqStep step = stats_.note_seq(header_scratch_.seq());
  if (step == SeqStep::kBackwards || step == SeqStep::kJump) {
    restart_from_ = previous_seq;
    restart_to_ = header_scratch_.seq();
    if (stats_.seq_restarts == 1) {
      spdlog::warn("frame seq went from {} to {}: taken as a camera restart (or a corrupt header), not as "
                   "missed frames (further ones are summarised once per second)",
                   restart_from_, restart_to_);
      restarts_logged_ = 1;
    }
  } else if (step == SeqStep::kRepeat && stats_.frames_repeated == 1) {
    spdlog::warn("frame seq {} arrived twice: counted as repeated (duplicate frames from the camera?)",
                 header_scratch_.seq());
    repeats_logged_ = 1;
  }
  if (stale_) {
    spdlog::info("frames resumed after {:.1f} s", std::chrono::duration<double>(t_received - last_frame_).count());
    stale_ = false;
  }
  last_frame_ = t_received;
  // source_id rarely changes: compare, and copy (allocating) only when it does.
  if (header_scratch_.source_id() != last_source_id_) last_source_id_ = header_scratch_.source_id();
  const auto t_checked = std::chrono::steady_clock::now();

  workers_.measure_rows(pipeline_, *checked.image);
  pipeline_.finish(measurement_);
  last_image_ = *checked.image;
  has_last_image_ = true;
  ++stats_.frames_processed;
  const auto t_measured = std::chrono::steady_clock::now();

  io::MeasurementStamp stamp;
  stamp.frame_seq = header_scratch_.seq();
  stamp.camera_time_ns = header_scratch_.camera_time_ns();
  stamp.received_time_ns = received_ns;
  stamp.n_subap_x = pipeline_.settings().grid.n_subap_x;
  stamp.n_subap_y = pipeline_.settings().grid.n_subap_y;
  stamp.slope_unit = config_.slope_unit;
  stamp.units_per_px = config_.units_per_px;
  stamp.centroider = pipeline_.settings().centroider.kind;
  stamp.settings_generation = settings_generation_;
  stamp.check_us = micros(t_checked - t_received);
  stamp.centroid_us = micros(t_measured - t_checked);
  stamp.published_time_ns = wall_ns();
  io::encode_measurement(measurement_, stamp, out_msg_);
  zmq::message_t out(out_msg_.ByteSizeLong());
  out_msg_.SerializeWithCachedSizesToArray(static_cast<std::uint8_t*>(out.data()));
  if (measurements_.send(out, zmq::send_flags::dontwait)) ++stats_.measurements_published;
  stats_.record_latency_us(micros(std::chrono::steady_clock::now() - t_received));
  // After the measurement is out (and its latency taken): the insight
  // thread gets a copy, or counts a skip; it never makes the loop wait.
  if (insight_) insight_->offer(measurement_, *checked.image, header_scratch_.seq(), out_msg_);
  // After the measurement is out: a running acquisition takes the frame.
  if (calibration_.running() &&
      calibration_.feed(*checked.image, measurement_, header_scratch_.exposure_us(), settings_generation_)) {
    if (auto next = calibration_.finish(pipeline_.settings())) apply_settings(std::move(*next), "calibration");
    v1::CalibrationReply r;
    calibration_.describe(pipeline_.settings(), r);
    if (r.acquisition().state() == v1::ACQUISITION_STATE_DONE) spdlog::info("{}", r.acquisition().message());
    else spdlog::warn("{} acquisition failed: {}", r.acquisition().kind_name(), r.acquisition().message());
  }
}

void Daemon::apply_settings(core::PipelineSettings next, const std::string& why) {
  pipeline_ = core::Pipeline(std::move(next), config_.worker_threads);
  if (insight_) insight_->reconfigure(pipeline_);
  measurement_ = pipeline_.make_measurement();
  // The last frame was measured under the old settings (perhaps another
  // grid): it cannot serve a reference capture any more.
  has_last_image_ = false;
  io::encode_measurement(measurement_, io::MeasurementStamp{}, out_msg_);
  out_msg_.set_sensor_name(config_.sensor_name);
  ++settings_generation_;
  const auto& g = pipeline_.settings().grid;
  spdlog::info("{}: now {} x {} subapertures of {} px, {} path (settings generation {})", why, g.n_subap_x,
               g.n_subap_y, g.pitch_px, pipeline_.folded() ? "folded" : "float", settings_generation_);
}

void Daemon::calibrate(const v1::CalibrationRequest& req, v1::ControlReply& reply) {
  auto* out = reply.mutable_calibration();
  switch (req.action_case()) {
    case v1::CalibrationRequest::kStart:
      if (auto e = calibration_.start(req.start(), pipeline_.settings(), settings_generation_); !e.empty())
        return reply.set_error(e);
      spdlog::info("{} acquisition started over {} frames", acquisition_kind_name(req.start().kind()),
                   req.start().frames());
      break;
    case v1::CalibrationRequest::kCancel:
      if (!calibration_.cancel()) return reply.set_error("no acquisition is running");
      spdlog::info("acquisition cancelled");
      break;
    case v1::CalibrationRequest::kShow:
      break;
    case v1::CalibrationRequest::kSave: {
      std::filesystem::path written;
      if (auto e = calibration_.save(req.save(), pipeline_.settings(), written); !e.empty()) return reply.set_error(e);
      out->set_set_path(written.string());
      spdlog::info("calibration saved to {}", written.string());
      break;
    }
    case v1::CalibrationRequest::kLoad: {
      if (calibration_.running())
        return reply.set_error("an acquisition is running; cancel it before loading a set");
      std::filesystem::path read;
      auto next = calibration_.load(req.load(), pipeline_.settings(), read);
      if (auto* e = std::get_if<std::string>(&next))
        return reply.set_error(*e + " (the calibration in force is unchanged)");
      apply_settings(std::move(std::get<core::PipelineSettings>(next)), "calibration set " + read.string());
      out->set_set_path(read.string());
      break;
    }
    case v1::CalibrationRequest::ACTION_NOT_SET:
      return reply.set_error("empty calibration request: set one action (start, cancel, show, save, load)");
  }
  describe_calibration(*out);
  reply.set_ok(true);
}

void Daemon::describe_calibration(v1::CalibrationReply& out) const {
  calibration_.describe(pipeline_.settings(), out);
  out.set_settings_generation(settings_generation_);
  out.set_slope_unit(std::string(core::slope_unit_name(config_.slope_unit)));
  out.set_units_per_px(config_.units_per_px);
}

void Daemon::reject(core::FrameReject reason, const core::RejectedFrame& frame) {
  stats_.count_reject(reason);
  last_rejected_[static_cast<std::size_t>(reason)] = frame;
  // First occurrence of each reason is logged at once; later ones are summed
  // up by tick(), at most once per second per reason.
  if (stats_.rejected(reason) == 1) {
    spdlog::warn("rejected a frame: {}: {} (further rejections are summarised once per second)",
                 core::frame_reject_name(reason), core::describe_reject(reason, frame, config_.pipeline.camera));
    rejects_logged_[static_cast<std::size_t>(reason)] = 1;
  }
}

void Daemon::tick(double period_s) {
  stats_.tick(period_s);
  for (core::FrameReject r : core::kAllFrameRejects) {
    auto& logged = rejects_logged_[static_cast<std::size_t>(r)];
    const std::uint64_t total = stats_.rejected(r);
    if (total > logged) {
      spdlog::warn("rejected {} more frame(s): {} ({} in total); the last: {}", total - logged,
                   core::frame_reject_name(r), total,
                   core::describe_reject(r, last_rejected_[static_cast<std::size_t>(r)], config_.pipeline.camera));
      logged = total;
    }
  }
  if (stats_.seq_restarts > restarts_logged_) {
    spdlog::warn("{} more seq restart(s) ({} in total); the last went from {} to {}",
                 stats_.seq_restarts - restarts_logged_, stats_.seq_restarts, restart_from_, restart_to_);
    restarts_logged_ = stats_.seq_restarts;
  }
  if (stats_.frames_repeated > repeats_logged_) {
    spdlog::warn("{} more repeated seq(s) ({} in total)", stats_.frames_repeated - repeats_logged_,
                 stats_.frames_repeated);
    repeats_logged_ = stats_.frames_repeated;
  }
  const auto now = std::chrono::steady_clock::now();
  if (stats_.has_last_seq && !stale_ &&
      now - last_frame_ >= std::chrono::duration<double>(config_.stale_after_s)) {
    stale_ = true;
    spdlog::warn("no frame from {} for {:.1f} s: stream state is now stale", config_.endpoints.frames_in,
                 std::chrono::duration<double>(now - last_frame_).count());
  }
}

void Daemon::handle_zap() {
  std::vector<zmq::message_t> parts;
  zmq::message_t part;
  do {
    if (!zap_.recv(part, zmq::recv_flags::dontwait)) break;
    parts.push_back(std::move(part));
  } while (parts.back().more());
  // version, request id, domain, address, routing id, mechanism, credentials...
  if (parts.size() < 6) return;
  const std::string version = parts[0].to_string(), request_id = parts[1].to_string();
  const std::string mechanism = parts[5].to_string();
  const io::ClientKey* client = nullptr;
  if (mechanism == "CURVE" && parts.size() >= 7 && parts[6].size() == 32) {
    char z85[41] = {};
    zmq_z85_encode(z85, static_cast<const std::uint8_t*>(parts[6].data()), 32);
    for (const auto& c : config_.clients)
      if (c.public_z85 == z85) client = &c;
  }
  if (!client) {
    ++connections_refused_;
    spdlog::warn("refused a {} connection from {}: its key is not in the clients file ({} refused so far)",
                 mechanism, parts[3].to_string(), connections_refused_);
  }
  const std::string status = client ? "200" : "400", text = client ? "OK" : "key not allowed";
  const std::string user = client ? (client->may_change ? "change" : "read") : "";
  zap_.send(zmq::buffer(version), zmq::send_flags::sndmore);
  zap_.send(zmq::buffer(request_id), zmq::send_flags::sndmore);
  zap_.send(zmq::buffer(status), zmq::send_flags::sndmore);
  zap_.send(zmq::buffer(text), zmq::send_flags::sndmore);
  zap_.send(zmq::buffer(user), zmq::send_flags::sndmore);
  zap_.send(zmq::str_buffer(""), zmq::send_flags::none);
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

void Daemon::fill_status(v1::StatusReply& s) {
  stats_.rate_since_start(std::chrono::duration<double>(std::chrono::steady_clock::now() - started_).count());
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
    if (stats_.rejected(r) > 0)
      c->set_last_detail(
          core::describe_reject(r, last_rejected_[static_cast<std::size_t>(r)], config_.pipeline.camera));
  }
  s.set_measurements_published(stats_.measurements_published);
  s.set_frames_missed(stats_.frames_missed);
  s.set_last_seq(stats_.last_seq);
  s.set_has_last_seq(stats_.has_last_seq);
  s.set_frame_rate_hz(stats_.frame_rate_hz);
  s.set_frames_repeated(stats_.frames_repeated);
  s.set_seq_restarts(stats_.seq_restarts);
  s.set_frame_connection_drops(stats_.frame_connection_drops);
  s.set_frames_skipped(stats_.frames_skipped);
  s.set_newest_frame_only(config_.newest_frame_only);
  s.set_access_control(config_.curve);
  s.set_connections_refused(connections_refused_);
  s.set_sensor_name(config_.sensor_name);
  if (insight_) {
    s.set_insight_frames_analysed(insight_->frames_analysed());
    s.set_insight_frames_skipped(insight_->frames_skipped());
    s.set_shadow_frames(insight_->shadow_frames());
  }
  const auto now = std::chrono::steady_clock::now();
  v1::StreamState state = v1::STREAM_STATE_WAITING;
  if (stats_.has_last_seq) {
    const double age = std::chrono::duration<double>(now - last_frame_).count();
    s.set_last_frame_age_s(age);
    state = age >= config_.stale_after_s ? v1::STREAM_STATE_STALE : v1::STREAM_STATE_OK;
  }
  s.set_stream_state(state);
  s.set_stream_state_name(stream_state_name(state));
  s.set_stale_after_s(config_.stale_after_s);
  s.set_last_source_id(last_source_id_);
  const LatencySummary lat = stats_.latency();
  s.set_latency_median_us(lat.median_us);
  s.set_latency_p99_us(lat.p99_us);
  s.set_latency_max_us(lat.max_us);
  s.set_latency_window_frames(lat.frames);
  s.set_measurement_subscribers(static_cast<std::uint32_t>(std::max(0, subscribers_)));
  const auto& p = pipeline_.settings();
  s.set_width_px(p.camera.width_px);
  s.set_height_px(p.camera.height_px);
  s.set_n_subap_x(p.grid.n_subap_x);
  s.set_n_subap_y(p.grid.n_subap_y);
  s.set_pitch_px(p.grid.pitch_px);
  s.set_dark_loaded(!p.dark_adu.empty());
  s.set_pixel_type(std::string(core::pixel_format_name(p.camera.format)));
  s.set_max_frame_bytes(config_.max_frame_bytes);
  io::describe_centroider(pipeline_.settings().centroider, settings_generation_, *s.mutable_centroider());
  s.set_worker_threads(static_cast<std::uint32_t>(workers_.threads()));
  s.set_simd(core::simd_level_name(pipeline_.simd()));
  describe_calibration(*s.mutable_calibration());
}

void Daemon::set_shadow(const v1::SetCentroiderRequest& req, v1::ControlReply& reply) {
  if (!insight_) return reply.set_error("no shadow without [insight] enabled = true in the daemon's config");
  if (req.capture_reference()) return reply.set_error("the shadow takes the synthetic correlation reference only");
  if (req.shadow_off()) {
    if (!shadow_.has_value()) return reply.set_error("no shadow centroider is running");
    shadow_.reset();
    insight_->set_shadow(std::nullopt);
    spdlog::info("shadow centroider stopped");
    reply.set_ok(true);
    return;
  }
  core::CentroiderSettings next = shadow_.value_or(pipeline_.settings().centroider);
  for (const v1::CentroiderOption& o : req.options()) {
    const auto value = io::from_wire(o);
    if (!value) return reply.set_error(fmt::format("centroider option '{}' has no value", o.key()));
    if (auto e = core::apply_option(next, o.key(), *value); !e.empty()) return reply.set_error(e);
  }
  if (next.reference != core::ReferenceSource::kGaussian)
    return reply.set_error("the shadow takes the synthetic (Gaussian) correlation reference only");
  core::PipelineSettings settings = pipeline_.settings();
  settings.centroider = next;
  if (auto e = core::validate(settings); !e.empty()) return reply.set_error(e);
  const bool changed = !shadow_ || core::list_options(next) != core::list_options(*shadow_);
  if (changed && (req.options_size() > 0 || !shadow_)) {
    shadow_ = next;
    insight_->set_shadow(next);
    spdlog::info("shadow centroider now {}", core::describe(next));
  }
  auto* out = reply.mutable_centroider();
  io::describe_centroider(*shadow_, settings_generation_, *out);
  out->set_changed(changed);
  reply.set_ok(true);
}

void Daemon::set_centroider(const v1::SetCentroiderRequest& req, v1::ControlReply& reply) {
  if (req.shadow() || req.shadow_off()) return set_shadow(req, reply);
  const core::CentroiderSettings& now = pipeline_.settings().centroider;
  core::CentroiderSettings next = now;
  bool file_named = false;
  for (const v1::CentroiderOption& o : req.options()) {
    const auto value = io::from_wire(o);
    if (!value) return reply.set_error(fmt::format("centroider option '{}' has no value", o.key()));
    if (auto e = core::apply_option(next, o.key(), *value); !e.empty()) return reply.set_error(e);
    file_named |= o.key() == "reference_file";
  }
  if (req.capture_reference()) {
    if (!has_last_image_)
      return reply.set_error("no measured frame to capture a reference from (none has arrived, or the last "
                             "one was rejected); try again while frames flow");
    auto ref = pipeline_.capture_reference(last_image_, measurement_);
    if (auto* e = std::get_if<std::string>(&ref)) return reply.set_error("cannot capture a reference: " + *e);
    next.reference = core::ReferenceSource::kCaptured;
    next.reference_image = std::move(std::get<std::vector<float>>(ref));
    next.reference_size = pipeline_.settings().grid.pitch_px;
  } else if (next.reference == core::ReferenceSource::kCaptured && now.reference != core::ReferenceSource::kCaptured) {
    return reply.set_error("reference = \"captured\" needs an image captured from the live frames: send "
                           "capture_reference (slopecast centroider --capture-reference)");
  }
  // A live request may name only a file inside the config's folder: a
  // relative path without "..", so the control endpoint cannot be used to
  // read (or probe for) files elsewhere.
  if (file_named) {
    const std::filesystem::path named(next.reference_file);
    bool climbs = false;
    for (const auto& part : named) climbs |= part == "..";
    if (named.is_absolute() || climbs)
      return reply.set_error(fmt::format("reference_file '{}': a live request may name only a relative path "
                                         "inside the config's folder (no '..', not absolute)",
                                         next.reference_file));
  }
  if (next.reference == core::ReferenceSource::kFile && (file_named || now.reference != core::ReferenceSource::kFile))
    if (auto e = io::load_reference_image(next, config_.base_dir); !e.empty()) return reply.set_error(e);
  core::PipelineSettings settings = pipeline_.settings();
  settings.centroider = next;
  if (auto e = core::validate(settings); !e.empty()) return reply.set_error(e);
  const bool changed = req.capture_reference() || core::list_options(next) != core::list_options(now) ||
                       next.reference_image != now.reference_image;
  if (changed) {
    // Built here, between two frames: the frame after this request is the
    // first measured with the new settings.
    pipeline_ = core::Pipeline(std::move(settings), config_.worker_threads);
    if (insight_) insight_->reconfigure(pipeline_);
    ++settings_generation_;
    spdlog::info("centroider now {} (settings generation {})", core::describe(pipeline_.settings().centroider),
                 settings_generation_);
  }
  auto* out = reply.mutable_centroider();
  io::describe_centroider(pipeline_.settings().centroider, settings_generation_, *out);
  out->set_changed(changed);
  reply.set_ok(true);
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
  } else if (config_.curve && changes_something(req) && !may_change(req_msg)) {
    reply.set_error("this client's key may only read (status, calibration show): changing settings or the "
                    "calibration needs a key with role \"change\" in the daemon's clients file");
  } else {
    switch (req.command_case()) {
      case v1::ControlRequest::kStatus:
        fill_status(*reply.mutable_status());
        reply.set_ok(true);
        break;
      case v1::ControlRequest::kSetCentroider:
        set_centroider(req.set_centroider(), reply);
        break;
      case v1::ControlRequest::kCalibration:
        calibrate(req.calibration(), reply);
        break;
      case v1::ControlRequest::COMMAND_NOT_SET:
        reply.set_error("empty request: set one command (status, set_centroider, calibration)");
        break;
    }
  }
  const std::string bytes = reply.SerializeAsString();
  (void)control_.send(zmq::buffer(bytes), zmq::send_flags::dontwait);
}

}  // namespace slopecast::app

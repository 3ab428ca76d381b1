// slopecastd's event loop: frames in, measurements out, control answered.
//
// DESIGN
// One thread runs everything, in Daemon::run(): a zmq_poll over five
// sources — the frame SUB socket, the control REP socket, the measurement
// XPUB socket (subscribe/unsubscribe notices, for the subscriber count), a
// monitor of the frame socket's connection events, and a signalfd for
// SIGINT/SIGTERM (stop) and SIGHUP (logged and ignored: the daemon does not
// reload its config; restart it to apply a change) — and a sixth with
// [security]: the ZAP socket that admits CURVE clients by key. Frames are handled in arrival order, each to
// completion (check, measure, publish) before the next is read, so
// measurements leave in frame order. Housekeeping (rate, rate-limited reject
// logs) runs in tick() once per kTickPeriod, between frames.
//
// Buffers: a frame's bytes belong to the received zmq::message_t and are read
// in place (no copy); the Pipeline owns its scratch window; the FrameMeasurement
// and the outgoing v1::Measurement are allocated once and reused.
//
// Overflow: if frames arrive faster than they are measured, the SUB socket's
// high-water mark (frame_queue_depth) makes ZeroMQ drop the excess; the gaps
// show up as frames_missed. Measurement publishing never blocks: a slow
// subscriber loses messages at its own high-water mark.
//
// Never deaf: a frame part larger than max_frame_bytes makes ZeroMQ close the
// camera's connection, and after such a protocol error it does not reconnect
// by itself (libzmq terminates the session instead of retrying). The monitor
// reports every disconnect of the frame socket; the daemon then counts it
// (frame_connection_drops), logs it with the cap, and disconnects and
// reconnects frames_in, so the stream resumes from the same camera or a
// restarted one. Frames up to the cap that do not match the camera are
// received whole and rejected with what arrived against what was expected.
#pragma once

#include <chrono>
#include <memory>
#include <string>

#include <zmq.hpp>

#include "daemon/app/calibration_session.h"
#include "daemon/app/daemon_stats.h"
#include "daemon/app/insight_worker.h"
#include "daemon/app/row_workers.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/daemon_config.h"
#include "slopecast/v1/control.pb.h"
#include "slopecast/v1/frame.pb.h"
#include "slopecast/v1/measurement.pb.h"

namespace slopecast::app {

inline constexpr const char* kVersion = "0.1.0";
// Largest control request accepted, bytes; a larger one drops its connection.
inline constexpr std::int64_t kMaxControlRequestBytes = 1 << 16;
// Largest message accepted on the measurement socket, bytes: subscriptions
// (1 byte of kind + the topic prefix) and, with [security], the CURVE
// handshake's INITIATE command (about 300 bytes), which the cap also
// governs.
inline constexpr std::int64_t kMaxSubscriptionBytes = 4096;

class Daemon {
 public:
  // Binds the measurement and control endpoints and connects to the frame
  // endpoint. Throws zmq::error_t (with the endpoint in the log) when a bind
  // fails; main reports it and exits.
  explicit Daemon(io::DaemonConfig config);
  ~Daemon();

  // Runs until a signal arrives on signal_fd (a signalfd for SIGINT/SIGTERM).
  // Returns the process exit code.
  int run(int signal_fd);

 private:
  // Handles up to kMaxFramesPerWake queued frames; returns how many.
  int handle_frames();
  void handle_monitor();
  void note_signal(int signal_fd, bool& stop);
  void handle_frame(zmq::message_t& header, zmq::message_t* payload, bool extra_parts);
  void reject(core::FrameReject reason, const core::RejectedFrame& frame);
  void handle_control();
  // Applies a set_centroider request: fills reply with the settings in force,
  // or an error and leaves them unchanged.
  void set_centroider(const v1::SetCentroiderRequest& req, v1::ControlReply& reply);
  // The same request with shadow or shadow_off: the insight thread's second
  // centroider.
  void set_shadow(const v1::SetCentroiderRequest& req, v1::ControlReply& reply);
  // Applies a calibration request (acquisitions, save, load, show).
  void calibrate(const v1::CalibrationRequest& req, v1::ControlReply& reply);
  // Builds the pipeline for `next` between two frames (settings generation
  // + 1); the grid shape may change with it.
  void apply_settings(core::PipelineSettings next, const std::string& why);
  void describe_calibration(v1::CalibrationReply& out) const;
  void handle_subscriptions();
  // Answers one ZAP request (ZeroMQ RFC 27): a CURVE client key in the
  // clients file is accepted with its role as user id, any other refused.
  void handle_zap();
  void tick(double period_s);
  void fill_status(v1::StatusReply& s);

  io::DaemonConfig config_;
  // The settings in force live in pipeline_.settings(); config_.pipeline keeps
  // what the daemon started with (the camera never changes; the grid shape
  // may, with a registration or a loaded calibration set).
  core::Pipeline pipeline_;
  RowWorkers workers_;
  std::uint32_t settings_generation_ = 1;  // +1 per applied settings change
  CalibrationSession calibration_;
  // The last measured frame, for capturing a reference: a view into
  // payload_msg_, valid while has_last_image_ (until the next frame is read).
  core::ImageView last_image_{};
  bool has_last_image_ = false;
  core::FrameMeasurement measurement_;
  v1::FrameHeader header_scratch_;
  v1::Measurement out_msg_;
  DaemonStats stats_;
  std::chrono::steady_clock::time_point started_;

  // Rate-limited reject logging: at most one line per reason per tick.
  std::array<std::uint64_t, core::kFrameRejectCount> rejects_logged_{};
  // The last frame rejected for each reason, for logs and status.
  std::array<core::RejectedFrame, core::kFrameRejectCount> last_rejected_{};
  // Seq restarts and repeats, logged like rejects.
  std::uint64_t restarts_logged_ = 0, repeats_logged_ = 0;
  std::uint64_t restart_from_ = 0, restart_to_ = 0;  // the last restart's seqs

  // The camera's stream: last accepted frame, its sender, stale or not.
  std::chrono::steady_clock::time_point last_frame_{};
  bool stale_ = false;
  std::string last_source_id_;

  int subscribers_ = 0;
  zmq::context_t ctx_;
  zmq::socket_t frames_;
  zmq::socket_t measurements_;
  zmq::socket_t control_;
  zmq::socket_t frames_monitor_;  // PAIR receiving frames_' connection events
  zmq::socket_t zap_;             // REP on inproc://zeromq.zap.01 when [security] is on
  // [insight]: the analysis thread and its PUB socket (none when off).
  std::unique_ptr<InsightWorker> insight_;
  std::optional<core::CentroiderSettings> shadow_;  // the shadow centroider in force
  std::uint64_t connections_refused_ = 0;
  zmq::message_t header_msg_, payload_msg_, extra_msg_;
};

}  // namespace slopecast::app

// `slopecast status`: ask the daemon how it is doing and print the answer.
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/control_client.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "status";

struct StatusOptions {
  KeyOptions keys;
  std::string config;
  std::string control = io::kDefaultControlEndpoint;
  double timeout_s = 2.0;
  double wait_s = 0.0;
  bool json = false;
};

void print_status(const v1::StatusReply& s) {
  std::cout << fmt::format(
      "slopecastd {}  up {:.1f} s\n"
      "  sensor        {} x {} px {}, {} x {} subapertures of {} px, dark {}\n"
      "  centroider    {}  (settings generation {})\n"
      "  stream        {}  last frame {} ago  from '{}'\n"
      "  frames        received {}  processed {}  rejected {}  missed {}  skipped {}  rate {:.1f} Hz\n"
      "  seq           last {}  repeated {}  restarts {}  connection drops {}\n"
      "  measurements  published {}  subscriptions {}\n"
      "  latency       median {:.1f} us  p99 {:.1f} us  max {:.1f} us  (received -> published, last {} frames)\n",
      s.version(), s.uptime_s(), s.width_px(), s.height_px(), s.pixel_type(), s.n_subap_x(), s.n_subap_y(),
      s.pitch_px(), s.dark_loaded() ? "loaded" : "none", s.centroider().summary(),
      s.centroider().settings_generation(), s.stream_state_name(),
      s.has_last_seq() ? fmt::format("{:.2f} s", s.last_frame_age_s()) : std::string("-"), s.last_source_id(),
      s.frames_received(), s.frames_processed(), s.frames_rejected(), s.frames_missed(), s.frames_skipped(),
      s.frame_rate_hz(),
      s.has_last_seq() ? std::to_string(s.last_seq()) : std::string("-"), s.frames_repeated(), s.seq_restarts(),
      s.frame_connection_drops(), s.measurements_published(), s.measurement_subscribers(), s.latency_median_us(),
      s.latency_p99_us(), s.latency_max_us(), s.latency_window_frames());
  const auto& c = s.calibration();
  std::cout << fmt::format("  calibration   layout {}; {} of {} subapertures in the valid map; {}; flat {}; "
                           "{} bad pixel(s); slopes in {}\n",
                           c.layout(), c.subapertures_in_map(), c.n_subap_x() * c.n_subap_y(),
                           c.reference_slopes() ? "reference slopes" : "no reference slopes", c.flat() ? "yes" : "no",
                           c.bad_pixels(), c.slope_unit());
  if (c.acquisition().state() == v1::ACQUISITION_STATE_RUNNING)
    std::cout << fmt::format("  acquiring     {}: {} of {} frames\n", c.acquisition().kind_name(),
                             c.acquisition().frames_done(), c.acquisition().frames_wanted());
  if (s.insight_frames_analysed() + s.insight_frames_skipped() > 0)
    std::cout << fmt::format("  insight       analysed {}  skipped while busy {}  shadow measured {}\n",
                             s.insight_frames_analysed(), s.insight_frames_skipped(), s.shadow_frames());
  std::cout << "  rejected by reason:";
  for (const auto& r : s.rejected()) std::cout << fmt::format(" {}={}", r.reason_name(), r.count());
  std::cout << "\n";
  for (const auto& r : s.rejected())
    if (r.count() > 0) std::cout << fmt::format("    last {}: {}\n", r.reason_name(), r.last_detail());
}

void run_status(StatusOptions o) {
  zmq::context_t ctx(1);
  const auto connection = connect_control(kCmd, ctx, o.config, o.control, o.keys);
  if (!connection) return;
  client::ControlClient& control = *connection;
  const auto timeout = std::chrono::milliseconds(static_cast<long>(o.timeout_s * 1000));
  auto result = o.wait_s > 0 ? control.wait_ready(std::chrono::milliseconds(static_cast<long>(o.wait_s * 1000)))
                             : control.status(timeout);
  if (auto* err = std::get_if<std::string>(&result)) {
    if (stop_requested()) return;  // main turns the stop into 128 + signal
    std::cerr << "slopecast status: " << *err << "\n";
    exit_code() = 1;
    return;
  }
  const auto& reply = std::get<v1::ControlReply>(result);
  if (!reply.ok()) {
    std::cerr << "slopecast status: refused: " << reply.error() << "\n";
    exit_code() = 1;
    return;
  }
  if (o.json) return print_json(kCmd, reply.status());
  print_status(reply.status());
}

}  // namespace

void add_status_command(CLI::App& app) {
  auto opts = std::make_shared<StatusOptions>();
  auto* cmd = app.add_subcommand("status", "Ask slopecastd for its counters, rate and latency");
  auto* config = cmd->add_option("--config", opts->config, "Take the control endpoint from this slopecastd config file")
                    ->check(CLI::ExistingFile);
  cmd->add_option("--control", opts->control, "Daemon control endpoint")->capture_default_str()->excludes(config);
  cmd->add_flag("--json", opts->json,
                "Print the reply as JSON (protobuf's JSON mapping, field names as in control.proto) for scripts");
  cmd->add_option("--timeout-s", opts->timeout_s, "Seconds to wait for the reply")
      ->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--wait-s", opts->wait_s,
                  "Keep asking for up to this many seconds until the daemon answers (readiness check)")
      ->check(CLI::NonNegativeNumber);
  add_key_options(cmd, opts->keys);
  cmd->callback([opts] { run_status(*opts); });
}

}  // namespace slopecast::cli

// `slopecast status`: ask the daemon how it is doing and print the answer.
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/control_client.h"

namespace slopecast::cli {

namespace {

struct StatusOptions {
  std::string control = "tcp://127.0.0.1:6112";
  double timeout_s = 2.0;
  double wait_s = 0.0;
};

void print_status(const v1::StatusReply& s) {
  std::cout << fmt::format(
      "slopecastd {}  up {:.1f} s\n"
      "  sensor        {} x {} px, {} x {} subapertures of {} px, dark {}\n"
      "  frames        received {}  processed {}  rejected {}  missed {}  rate {:.1f} Hz\n"
      "  measurements  published {}  subscribers {}\n"
      "  last seq      {}\n"
      "  latency       median {:.1f} us  p99 {:.1f} us  max {:.1f} us  (received -> published, last {} frames)\n",
      s.version(), s.uptime_s(), s.width_px(), s.height_px(), s.n_subap_x(), s.n_subap_y(), s.pitch_px(),
      s.dark_loaded() ? "loaded" : "none", s.frames_received(), s.frames_processed(), s.frames_rejected(),
      s.frames_missed(), s.frame_rate_hz(), s.measurements_published(), s.measurement_subscribers(),
      s.has_last_seq() ? std::to_string(s.last_seq()) : std::string("-"), s.latency_median_us(),
      s.latency_p99_us(), s.latency_max_us(), s.latency_window_frames());
  std::cout << "  rejected by reason:";
  for (const auto& r : s.rejected()) std::cout << fmt::format(" {}={}", r.reason_name(), r.count());
  std::cout << "\n";
}

void run_status(const StatusOptions& o) {
  zmq::context_t ctx(1);
  client::ControlClient control(ctx, o.control);
  const auto timeout = std::chrono::milliseconds(static_cast<long>(o.timeout_s * 1000));
  auto result = o.wait_s > 0 ? control.wait_ready(std::chrono::milliseconds(static_cast<long>(o.wait_s * 1000)))
                             : control.status(timeout);
  if (auto* err = std::get_if<std::string>(&result)) {
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
  print_status(reply.status());
}

}  // namespace

void add_status_command(CLI::App& app) {
  auto opts = std::make_shared<StatusOptions>();
  auto* cmd = app.add_subcommand("status", "Ask slopecastd for its counters, rate and latency");
  cmd->add_option("--control", opts->control, "Daemon control endpoint")->capture_default_str();
  cmd->add_option("--timeout-s", opts->timeout_s, "Seconds to wait for the reply")
      ->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--wait-s", opts->wait_s,
                  "Keep asking for up to this many seconds until the daemon answers (readiness check)")
      ->check(CLI::NonNegativeNumber);
  cmd->callback([opts] { run_status(*opts); });
}

}  // namespace slopecast::cli

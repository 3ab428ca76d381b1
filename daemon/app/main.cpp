// slopecastd: the Shack–Hartmann measurement daemon. Parses the command line,
// loads and checks the config, blocks SIGINT/SIGTERM into a signalfd (before
// ZeroMQ starts its threads, so they inherit the mask) and runs the loop.
#include <signal.h>
#include <sys/signalfd.h>
#include <unistd.h>

#include <cstdio>
#include <iostream>

#include <CLI/CLI.hpp>
#include <spdlog/spdlog.h>

#include "daemon/app/daemon.h"
#include "daemon/core/pixel_format.h"
#include "daemon/io/daemon_config.h"

namespace {

constexpr const char* kConfigHelp = R"(
Config file (TOML). Unknown tables or keys are errors; relative paths are
relative to the config file.

  [endpoints]                          all default to loopback
  frames_in        = "tcp://127.0.0.1:6110"  camera PUB; the daemon connects
  measurements_out = "tcp://127.0.0.1:6111"  the daemon binds a PUB here
  control          = "tcp://127.0.0.1:6112"  the daemon binds a REP here

  [camera]                             every frame must match exactly
  width_px   = 240                     columns (x)
  height_px  = 240                     rows (y)
  pixel_type = "u16"                   u8 | u16 | u32 | f32 (little-endian)

  [lenslet_grid]                       boxes must lie inside the frame
  subapertures_x = 16
  subapertures_y = 16
  pitch_px       = 15                  box side, px
  origin_x_px    = 0                   first box's first column
  origin_y_px    = 0                   first box's first row

  [calibration]
  dark_frame   = "dark.fits"           optional; 2-D FITS, camera-sized, ADU
  min_flux_adu = 500.0                 below this a subaperture is invalid (default 0)

  [daemon]
  frame_queue_depth     = 4            frames queued before newer ones drop (default 4)
  measurement_queue_depth = 64         measurements queued per subscriber before drops (default 64)
  latency_window_frames = 4096         frames behind the status latency figures
)";

}  // namespace

int main(int argc, char** argv) {
  using namespace slopecast;
  CLI::App cli{"slopecastd: Shack–Hartmann frames in, calibrated slopes out, over ZeroMQ."};
  cli.footer(kConfigHelp);
  std::string config_path, check_path, log_level = "info";
  cli.add_option("-c,--config", config_path, "Config file (TOML) to run with")->check(CLI::ExistingFile);
  cli.add_option("--check-config", check_path,
                 "Validate a config file (and load its dark frame), print a summary and exit: "
                 "0 if it is usable, 1 if not");
  cli.add_option("--log-level", log_level, "trace, debug, info, warn, error or off")
      ->check(CLI::IsMember({"trace", "debug", "info", "warn", "error", "off"}));
  cli.add_flag_callback("--version", [] {
    std::cout << "slopecastd " << app::kVersion << "\n";
    std::exit(0);
  }, "Print the version and exit");
  CLI11_PARSE(cli, argc, argv);
  spdlog::set_level(spdlog::level::from_str(log_level));

  if (!check_path.empty()) {
    auto loaded = io::load_daemon_config(check_path);
    if (auto* e = std::get_if<io::ConfigError>(&loaded)) {
      std::cerr << "config error: " << e->message << "\n";
      return 1;
    }
    const auto& c = std::get<io::DaemonConfig>(loaded);
    const auto& p = c.pipeline;
    std::cout << "config OK: " << check_path << "\n"
              << "  camera        " << p.camera.width_px << " x " << p.camera.height_px << " px, "
              << core::pixel_format_name(p.camera.format) << "\n"
              << "  grid          " << p.grid.n_subap_x << " x " << p.grid.n_subap_y << " subapertures, pitch "
              << p.grid.pitch_px << " px, origin (" << p.grid.origin_x_px << ", " << p.grid.origin_y_px
              << ") px\n"
              << "  dark          " << (c.dark_frame.empty() ? "none" : c.dark_frame.string()) << "\n"
              << "  min flux      " << p.min_flux_adu << " ADU\n"
              << "  frames in     " << c.endpoints.frames_in << "\n"
              << "  measurements  " << c.endpoints.measurements_out << "\n"
              << "  control       " << c.endpoints.control << "\n";
    return 0;
  }
  if (config_path.empty()) {
    std::cerr << "slopecastd: give --config FILE to run, or --check-config FILE to validate\n"
              << "Run with --help for more information.\n";
    return 2;
  }
  auto loaded = io::load_daemon_config(config_path);
  if (auto* e = std::get_if<io::ConfigError>(&loaded)) {
    spdlog::error("config error: {}", e->message);
    return 1;
  }

  sigset_t stop_signals;
  sigemptyset(&stop_signals);
  sigaddset(&stop_signals, SIGINT);
  sigaddset(&stop_signals, SIGTERM);
  if (pthread_sigmask(SIG_BLOCK, &stop_signals, nullptr) != 0) {
    spdlog::error("cannot block SIGINT/SIGTERM");
    return 1;
  }
  const int signal_fd = signalfd(-1, &stop_signals, SFD_CLOEXEC);
  if (signal_fd < 0) {
    spdlog::error("cannot create signalfd");
    return 1;
  }
  try {
    app::Daemon daemon(std::move(std::get<io::DaemonConfig>(loaded)));
    const int rc = daemon.run(signal_fd);
    close(signal_fd);
    return rc;
  } catch (const std::exception& e) {
    spdlog::error("slopecastd stopped on an error: {}", e.what());
    close(signal_fd);
    return 1;
  }
}

// slopecastd: the Shack–Hartmann measurement daemon. Parses the command line,
// loads and checks the config, blocks SIGINT/SIGTERM/SIGHUP into a signalfd (before
// ZeroMQ starts its threads, so they inherit the mask) and runs the loop.
#include <signal.h>
#include <sys/resource.h>
#include <sys/signalfd.h>
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <iostream>

#include <CLI/CLI.hpp>
#include <fmt/format.h>
#include <spdlog/spdlog.h>

#include "daemon/app/daemon.h"
#include "daemon/app/library_logs.h"
#include "daemon/core/frame/pixel_format.h"
#include "daemon/io/daemon_config.h"

namespace {

constexpr const char* kConfigHelp = R"(
Config file (TOML). Unknown tables or keys are errors; relative paths are
relative to the config file.

  [endpoints]                          all default to loopback; tcp://host:port,
                                       ipc://path or inproc://name
  frames_in        = "tcp://127.0.0.1:10140"  the camera binds PUB; the daemon connects
  measurements_out = "tcp://127.0.0.1:10141"  the daemon binds a PUB here
  control          = "tcp://127.0.0.1:10142"  the daemon binds a REP here
  insight_out      = "tcp://127.0.0.1:10143"  with [insight] enabled: the daemon binds a PUB here

  [camera]                             every frame must match exactly
  width_px   = 240                     columns (x)
  height_px  = 240                     rows (y)
  pixel_type = "u16"                   u8 | u16 | u32 | f32 (little-endian)
  read_noise_e   = 3.0                 read noise, e- rms, and gain, e- per ADU: every
  gain_e_per_adu = 1.0                 measurement then carries each slope's model
                                       variance (slope_noise_var_x/y; gain 0: none)

  [lenslet_grid]                       boxes must lie inside the frame
  subapertures_x = 16
  subapertures_y = 16
  pitch_px       = 15                  box side, px
  origin_x_px    = 0                   first box's first column
  origin_y_px    = 0                   first box's first row
  layout_file    = "boxes.csv"         optional: boxes and reference points as a table
                                       (CSV x0,y0,width,height,ref_x,ref_y, or FITS
                                       with a LAYOUT table); pitch_px square boxes;
                                       the origin is then unused

  [calibration]
  set          = "calibrations/bench"  optional: start from a calibration set (layout,
                                       valid map, reference slopes, dark, sky, flat,
                                       bad pixels), as `slopecast calibrate save` writes
  calibration_dir = "calibrations"     where live save/load requests name their sets
                                       (default "calibrations")
  dark_frame   = "dark.fits"           optional; 2-D FITS, camera-sized, ADU
  sky_frame    = "sky.fits"            optional; camera-sized, ADU, dark removed:
                                       subtracted like the dark
  valid_map_file = "mask.fits"         optional; n_x x n_y FITS, non-zero = in use
  pupil_diameter_px = 350              optional pupil: subapertures with at least
  pupil_centre_x_px = 200              pupil_min_area_fraction (default 0.5) of their
  pupil_centre_y_px = 200              box inside the annulus are in the valid map
  pupil_obstruction = 0.3              (central obstruction: fraction of the diameter)
  background   = "border"              "border": per box, the clipped mean of its
                                       border ring is subtracted (default);
                                       "border_median": the ring's median;
                                       "none": nothing beyond the dark
  min_flux_adu = 500.0                 background-subtracted flux below this is
                                       invalid, ADU (default 0)
  min_snr      = 5.0                   flux significance below this is invalid
                                       (default 5; 0 turns it off)
  saturation_adu = 4095                a raw pixel at or above this saturates its
                                       box (default: the pixel type's full scale;
                                       no check for f32)
  min_valid_fraction = 0.5             fewer valid boxes than this fraction of the
                                       grid marks the frame few_valid (default 0.5)
  edge_margin_px  = 1.0                a centroid closer than this to its box edge is
                                       flagged near_edge (default 1; 0 turns it off)
  min_contrast    = 0.0                correlation peak contrast below this is flagged
                                       (0..1; default 0, off)
  max_fwhm_px     = 0.0                a wider spot (FWHM, larger axis) is flagged
                                       (default 0, off)
  min_fwhm_px     = 0.0                a narrower spot (FWHM, larger axis) is flagged
                                       narrow: a hot pixel (default 0, off)
  max_ellipticity = 0.0                a more elongated spot (1 - minor/major) is
                                       flagged (0..1; default 0, off)

@CENTROIDER@
  [optics]                             the published slope unit
  slope_unit = "px"                    "px" (default) | "rad" (pixel_size_um /
                                       lenslet_focal_length_mm per px) | "nm" (rad x
                                       lenslet_pitch_um) | "arcsec" (x plate scale)
  pixel_size_um           = 5.5
  lenslet_focal_length_mm = 3.2
  lenslet_pitch_um        = 57.0
  plate_scale_arcsec_per_px = 0.25

  [security]                           optional: CURVE encryption and keys on the
                                       measurement and control endpoints
  server_key_file = "daemon.key"       the daemon's key pair (`slopecast keys daemon`)
  clients_file    = "clients.toml"     [[client]] name, public (Z85), role = "change"
                                       (may change settings and calibration) or
                                       "read" (status and calibration show only);
                                       any other key is refused and counted

  [insight]                            beside the loop, on a thread of its own: Zernike
                                       modes, r0 and seeing, per-slope noise, shadow,
                                       previews (topics on insight_out)
  enabled               = false        true: run it (default false)
  report_rate_hz        = 2.0          modes/turbulence/noise/shadow reports per second
  window_frames         = 1000         rolling window for r0, noise, shadow (10..100000)
  zernike_max_noll      = 15           modes j = 2..this (3..66)
  telescope_diameter_m  = 1.2          the pupil's diameter in the telescope, m;
                                       without it r0 is refused (default 0)
  outer_scale_m         = 25.0         L0 the r0 estimators assume
  sensing_wavelength_nm = 635          also give r0 and seeing at this wavelength (0: no)
  strehl_wavelength_nm  = 1650         Strehl estimate at this wavelength (0: none)
  loop_closed           = false        true: slopes are loop residuals; r0 refused
  preview_rate_hz       = 1.0          previews for `slopecast snap` (0: none)
  preview_max_side_px   = 512          larger frames are binned down by a whole factor

  [shadow]                             with [insight]: a second centroider on the same
  method = "wcog"                      frames, off the hot path; the keys of
                                       [centroider]; publishes shadow - live statistics

  [daemon]
  frame_queue_depth     = 4            frames queued before newer ones drop (default 4)
  newest_frame_only     = false        true: when frames queue up, measure only the
                                       newest (the others are counted as skipped);
                                       false: measure every frame in order (default)
  measurement_queue_depth = 64         measurements queued per subscriber before drops (default 64)
  latency_window_frames = 4096         frames behind the status latency figures (16..65536)
  stale_after_s         = 1.0          no frame for this long: stream state "stale"
  max_seq_jump          = 100000       a larger forward seq jump is a restart, not
                                       missed frames
  sensor_name           = "wfs-a"      carried by every measurement and status reply, to
                                       tell several sensors' streams apart (default "")
  worker_threads        = 1            threads measuring each frame, rows split between
                                       them (default 1; try 2 for 80 x 80 and up)
  max_frame_bytes       = 180224       largest frame part accepted; a larger one
                                       drops the connection, which is counted and
                                       re-made (default 2 x frame + 64 KiB)

Signals: SIGINT and SIGTERM stop the daemon (exit 0); SIGHUP is logged and
ignored (the config is read only at start).
)";

// The [centroider] part of the help, from the one table of options.
std::string config_help() {
  std::string centroider =
      "  [centroider]                         how spots are measured; every key may be set,\n"
      "                                       a method reads the ones it needs; the same keys\n"
      "                                       change live with `slopecast centroider`\n";
  for (const auto& o : slopecast::core::kCentroiderOptions)
    centroider += fmt::format("  {:<24} {} [{}]\n", o.key, o.help, o.methods);
  std::string help = kConfigHelp;
  help.replace(help.find("@CENTROIDER@"), 12, centroider);
  return help;
}

}  // namespace

int main(int argc, char** argv) {
  using namespace slopecast;
  CLI::App cli{"slopecastd: Shack–Hartmann frames in, calibrated slopes out, over ZeroMQ."};
  cli.footer(config_help());
  std::string config_path, check_path, log_level = "info";
  cli.add_option("-c,--config", config_path, "Config file (TOML) to run with")->check(CLI::ExistingFile);
  cli.add_option("--check-config", check_path,
                 "Validate a config file (and load its dark frame), print a summary and exit: "
                 "0 if it is usable, 1 if not");
  cli.add_option("--log-level", log_level, "trace, debug, info, warn, error or off")
      ->check(CLI::IsMember({"trace", "debug", "info", "warn", "error", "off"}));
  bool journal = false;
  cli.add_flag("--journal", journal,
               "Log for the systemd journal: each line starts with its syslog priority (<3> error, <4> warning, "
               "<6> info, <7> debug) and no timestamp (the journal adds its own)");
  cli.add_flag_callback("--version", [] {
    std::cout << "slopecastd " << app::kVersion << "\n";
    std::exit(0);
  }, "Print the version and exit");
  CLI11_PARSE(cli, argc, argv);
  spdlog::set_level(spdlog::level::from_str(log_level));
  if (journal) {
    auto formatter = std::make_unique<spdlog::pattern_formatter>();
    formatter->add_flag<app::SyslogPriorityFlag>('*').set_pattern("<%*>%v");
    spdlog::set_formatter(std::move(formatter));
  }
  slopecast::app::route_protobuf_logs();

  if (!check_path.empty()) {
    auto loaded = io::load_daemon_config(check_path);
    if (auto* e = std::get_if<io::ConfigError>(&loaded)) {
      std::cerr << "config error: " << e->message << "\n";
      return 1;
    }
    const auto& c = std::get<io::DaemonConfig>(loaded);
    const auto& p = c.pipeline;
    const double saturation = p.saturation_adu.value_or(core::full_scale_adu(p.camera.format));
    const std::string layout = !c.calibration_set.empty() ? "from set " + c.calibration_set.string()
                               : !c.layout_file.empty()   ? "table from " + c.layout_file.string()
                                                          : fmt::format("regular, origin ({}, {}) px",
                                                                        p.grid.origin_x_px, p.grid.origin_y_px);
    const auto in_map = p.valid_map.empty() ? p.grid.count()
                                            : static_cast<int>(std::count(p.valid_map.begin(), p.valid_map.end(), 1));
    const auto bad = std::count_if(p.bad_pixels.begin(), p.bad_pixels.end(), [](auto v) { return v != 0; });
    std::cout << "config OK: " << check_path << "\n"
              << fmt::format("  camera        {} x {} px, {}\n", p.camera.width_px, p.camera.height_px,
                             core::pixel_format_name(p.camera.format))
              << fmt::format("  grid          {} x {} subapertures of {} px, layout {}\n", p.grid.n_subap_x,
                             p.grid.n_subap_y, p.grid.pitch_px, layout)
              << fmt::format("  valid map     {} of {} subapertures{}\n", in_map, p.grid.count(),
                             p.valid_map.empty() ? " (no map)" : "")
              << fmt::format("  reference     {}\n", p.reference_slope_x_px.empty() ? "none (the layout's reference points)"
                                                                                     : "reference slopes from the set")
              << fmt::format("  dark          {}; sky {}\n", !c.dark_frame.empty() ? c.dark_frame.string()
                                                       : !p.dark_adu.empty() ? "from the set" : "none",
                             p.sky_adu.empty() ? "none" : "loaded")
              << fmt::format("  flat          {}; bad pixels {}\n", p.flat.empty() ? "none" : "from the set", bad)
              << fmt::format("  background    {}\n", core::background_mode_name(p.background))
              << fmt::format("  min flux      {} ADU, min snr {}\n", p.min_flux_adu, p.min_snr)
              << fmt::format("  centroider    {}\n", core::describe(p.centroider))
              << fmt::format("  saturation    {}\n", std::isfinite(saturation) ? fmt::format("{} ADU (raw)", saturation)
                                                                              : std::string("not checked"))
              << fmt::format("  slopes in     {} ({} per px)\n", core::slope_unit_name(c.slope_unit), c.units_per_px)
              << fmt::format("  frame cap     {} bytes per part\n", c.max_frame_bytes)
              << fmt::format("  frames in     {}\n", c.endpoints.frames_in)
              << fmt::format("  measurements  {}\n", c.endpoints.measurements_out)
              << fmt::format("  control       {}\n", c.endpoints.control)
              << fmt::format("  calibrations  {}\n", c.calibration_dir.string());
    for (const auto& w : c.warnings) std::cout << "warning: " << w << "\n";
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

  // Every TCP connection to the daemon's sockets costs a file descriptor.
  // Under a 1024 soft limit, 1100 idle connections stopped control replies;
  // raise the soft limit to the hard one and say what it is.
  rlimit files{};
  if (getrlimit(RLIMIT_NOFILE, &files) == 0) {
    if (files.rlim_cur < files.rlim_max) {
      files.rlim_cur = files.rlim_max;
      setrlimit(RLIMIT_NOFILE, &files);
      getrlimit(RLIMIT_NOFILE, &files);
    }
    spdlog::info("open-file limit {}: about that many connections to the daemon's endpoints, all told",
                 static_cast<unsigned long long>(files.rlim_cur));
  }

  sigset_t stop_signals;
  sigemptyset(&stop_signals);
  sigaddset(&stop_signals, SIGINT);
  sigaddset(&stop_signals, SIGTERM);
  sigaddset(&stop_signals, SIGHUP);
  if (pthread_sigmask(SIG_BLOCK, &stop_signals, nullptr) != 0) {
    spdlog::error("cannot block SIGINT/SIGTERM/SIGHUP");
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

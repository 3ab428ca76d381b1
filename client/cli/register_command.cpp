// `slopecast register`: find the lenslet lattice (pitch, rotation, origin)
// and lay the subaperture boxes from it, either on a FITS image or cube
// (offline: the mean of the cube's planes, minus an optional dark; --out
// writes a calibration set that slopecastd can start from) or on the live
// stream (--live: the daemon averages the next frames, registers and applies
// the new layout between two frames).
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/calibration_progress.h"
#include "client/cli/commands.h"
#include "daemon/core/geometry/registration.h"
#include "daemon/io/calibration_set.h"
#include "daemon/io/fits_image.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "register";

struct RegisterOptions {
  KeyOptions keys;
  std::string image;
  std::string dark;
  std::string out;
  bool live = false;
  std::string config;
  std::string control = io::kDefaultControlEndpoint;
  std::uint32_t frames = 20;
  int box_px = 0;
  bool no_wait = false;
  bool json = false;
  double timeout_s = 2.0;
  std::string command_line;
};

void run_offline(const RegisterOptions& o) {
  auto cube = io::read_fits_cube(o.image);
  if (auto* e = std::get_if<io::FitsError>(&cube)) return fail(kCmd, e->message);
  const auto& c = std::get<io::FitsCube>(cube);
  const std::size_t plane = static_cast<std::size_t>(c.width) * c.height;
  std::vector<float> mean(plane, 0.0f);
  for (int z = 0; z < c.planes; ++z)
    for (std::size_t k = 0; k < plane; ++k) mean[k] += c.pixels[z * plane + k] / static_cast<float>(c.planes);
  if (!o.dark.empty()) {
    auto dark = io::read_fits_image(o.dark);
    if (auto* e = std::get_if<io::FitsError>(&dark)) return fail(kCmd, "--dark: " + e->message);
    const auto& d = std::get<io::FitsImage>(dark);
    if (d.width != c.width || d.height != c.height)
      return fail(kCmd, fmt::format("--dark is {} x {}, the image {} x {}", d.width, d.height, c.width, c.height));
    for (std::size_t k = 0; k < plane; ++k) mean[k] -= d.pixels[k];
  }
  core::RegistrationSettings rs;
  rs.box_px = o.box_px;
  auto reg = core::register_lattice(mean, c.width, c.height, rs);
  if (auto* e = std::get_if<std::string>(&reg)) return fail(kCmd, *e);
  const auto& r = std::get<core::Registration>(reg);
  const auto in = std::count(r.valid_map.begin(), r.valid_map.end(), 1);
  std::cout << fmt::format(
      "{} ({} x {} px, mean of {} plane(s)):\n  pitch {:.4f} px, rotation {:.4f} deg, origin ({:.3f}, {:.3f}) px\n"
      "  fit residual {:.4f} px rms over {} of {} spots\n  layout {} x {} subapertures of {} px, {} in the valid "
      "map\n",
      o.image, c.width, c.height, c.planes, r.fit.pitch_px, r.fit.rotation_deg, r.fit.origin_x_px, r.fit.origin_y_px,
      r.fit.residual_rms_px, r.fit.spots_used, r.fit.spots_found, r.grid.n_subap_x, r.grid.n_subap_y,
      r.grid.pitch_px, in);
  if (o.out.empty()) return;
  io::CalibrationSet set;
  set.camera_width_px = c.width;
  set.camera_height_px = c.height;
  set.grid = r.grid;
  set.layout = r.layout;
  set.valid_map = r.valid_map;
  set.lattice = r.fit;
  const io::Provenance p{io::utc_now_iso(), c.planes, 0.0, o.command_line};
  set.made["layout"] = p;
  set.made["valid_map"] = p;
  if (auto e = io::save_calibration_set(set, o.out); !e.empty()) return fail(kCmd, e);
  std::cout << "wrote calibration set " << o.out << "\n";
}

void run_register(RegisterOptions o) {
  if (!o.live) return run_offline(o);
  zmq::context_t ctx(1);
  const auto connection = connect_control(kCmd, ctx, o.config, o.control, o.keys);
  if (!connection) return;
  client::ControlClient& control = *connection;
  v1::ControlRequest request;
  auto* start = request.mutable_calibration()->mutable_start();
  start->set_kind(v1::ACQUISITION_KIND_REGISTRATION);
  start->set_frames(o.frames);
  start->set_box_px(static_cast<std::uint32_t>(o.box_px));
  start->set_command(o.command_line);
  run_acquisition(kCmd, control, request, o.timeout_s, o.no_wait, o.json);
}

}  // namespace

void add_register_command(CLI::App& app) {
  auto o = std::make_shared<RegisterOptions>();
  auto* cmd = app.add_subcommand(
      "register", "Find the lenslet lattice (pitch, rotation, origin) and lay the subaperture boxes from it");
  auto* image = cmd->add_option("image", o->image, "FITS image or cube of a flat (reference) wavefront")
                    ->check(CLI::ExistingFile);
  cmd->add_option("--dark", o->dark, "FITS dark subtracted from the image first")->check(CLI::ExistingFile)->needs(image);
  cmd->add_option("--out", o->out, "Write a calibration set (layout, valid map, lattice) to this folder")->needs(image);
  auto* live = cmd->add_flag("--live", o->live, "Register on the running daemon's frames and apply the new layout");
  live->excludes(image);
  auto* config = cmd->add_option("--config", o->config, "--live: take the control endpoint from this slopecastd config")
                     ->check(CLI::ExistingFile)->needs(live);
  cmd->add_option("--control", o->control, "--live: daemon control endpoint")->capture_default_str()->excludes(config)->needs(live);
  cmd->add_option("--frames", o->frames, "--live: frames averaged before registering")
      ->capture_default_str()->check(CLI::Range(1, 100000))->needs(live);
  cmd->add_option("--box-px", o->box_px, "Subaperture box side, px (default: the pitch rounded down)")->check(CLI::Range(2, 1024));
  cmd->add_flag("--no-wait", o->no_wait, "--live: start and return")->needs(live);
  cmd->add_flag("--json", o->json, "--live: print the daemon's reply as JSON")->needs(live);
  cmd->add_option("--timeout-s", o->timeout_s, "Seconds to wait for each reply")->capture_default_str()->check(CLI::PositiveNumber);
  add_key_options(cmd, o->keys);
  cmd->callback([o] {
    if (o->image.empty() && !o->live) return fail(kCmd, "give a FITS image or cube, or --live");
    o->command_line = invocation();
    run_register(*o);
  });
}

}  // namespace slopecast::cli

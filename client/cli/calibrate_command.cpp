// `slopecast calibrate`: calibrate the running daemon. Acquisitions (dark,
// sky, reference, valid-map, flat) average the next N frames in slopecastd and
// apply the result between two frames; this command starts one, shows its
// progress and waits for the outcome (Ctrl-C cancels it in the daemon).
// save / load / show manage calibration sets by name; `slopecast register`
// (register_command.cpp) does the registration.
#include <iostream>
#include <memory>
#include <thread>

#include <fmt/format.h>
#include <unistd.h>
#include <zmq.hpp>

#include "client/cli/calibration_progress.h"
#include "client/cli/commands.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "calibrate";

struct CalibrateOptions {
  KeyOptions keys;
  std::string config;
  std::string control = io::kDefaultControlEndpoint;
  std::string action;
  std::string name;
  std::uint32_t frames = 100;
  bool bad_pixels = false;
  double sigma = 5.0;
  double fraction = 0.5;
  bool no_wait = false;
  bool json = false;
  double timeout_s = 2.0;
};

void print_summary(const v1::CalibrationReply& c) {
  std::cout << fmt::format("calibration in force (settings generation {}):\n", c.settings_generation());
  std::cout << fmt::format("  layout       {} x {} subapertures of {} px, {}\n", c.n_subap_x(), c.n_subap_y(),
                           c.box_px(), c.layout());
  if (c.has_lattice()) {
    const auto& l = c.lattice();
    std::cout << fmt::format("  lattice      pitch {:.4f} px, rotation {:.4f} deg, origin ({:.3f}, {:.3f}) px, "
                             "residual {:.4f} px rms ({} of {} spots)\n",
                             l.pitch_px(), l.rotation_deg(), l.origin_x_px(), l.origin_y_px(), l.residual_rms_px(),
                             l.spots_used(), l.spots_found());
  }
  std::cout << fmt::format("  valid map    {} of {} subapertures in use\n", c.subapertures_in_map(),
                           c.n_subap_x() * c.n_subap_y());
  std::cout << fmt::format("  reference    {}\n", c.reference_slopes() ? "reference slopes subtracted" : "none (slopes from the layout's reference points)");
  std::cout << fmt::format("  dark {}, sky {}, flat {}, bad pixels {}\n", c.dark() ? "yes" : "no",
                           c.sky() ? "yes" : "no", c.flat() ? "yes" : "no", c.bad_pixels());
  std::cout << fmt::format("  slopes in    {} ({} per px)\n", c.slope_unit(), c.units_per_px());
  const auto& a = c.acquisition();
  if (a.state() != v1::ACQUISITION_STATE_IDLE)
    std::cout << fmt::format("  last acquisition: {} {}, {} of {} frames{}{}\n", a.kind_name(), a.state_name(),
                             a.frames_done(), a.frames_wanted(), a.message().empty() ? "" : ": ", a.message());
}

void run_calibrate(CalibrateOptions o) {
  zmq::context_t ctx(1);
  const auto connection = connect_control(kCmd, ctx, o.config, o.control, o.keys);
  if (!connection) return;
  client::ControlClient& control = *connection;
  v1::ControlRequest request;
  auto* cal = request.mutable_calibration();
  if (o.action == "dark" || o.action == "sky" || o.action == "reference" || o.action == "valid-map" ||
      o.action == "flat") {
    auto* start = cal->mutable_start();
    start->set_kind(o.action == "dark"        ? v1::ACQUISITION_KIND_DARK
                    : o.action == "sky"       ? v1::ACQUISITION_KIND_SKY
                    : o.action == "reference" ? v1::ACQUISITION_KIND_REFERENCE_SLOPES
                    : o.action == "valid-map" ? v1::ACQUISITION_KIND_VALID_MAP
                                              : v1::ACQUISITION_KIND_FLAT);
    start->set_frames(o.frames);
    start->set_bad_pixels(o.bad_pixels);
    start->set_bad_pixel_sigma(o.sigma);
    start->set_flux_fraction(o.fraction);
    start->set_command(invocation());
    if (o.action == "dark")
      std::cerr << "slopecast calibrate: averaging frames as the dark: the light source must be OFF\n";
    return run_acquisition(kCmd, control, request, o.timeout_s, o.no_wait, o.json);
  }
  if (o.action == "save") cal->set_save(o.name);
  else if (o.action == "load") cal->set_load(o.name);
  else if (o.action == "cancel") cal->set_cancel(true);
  else cal->set_show(true);
  const auto reply = call_daemon(kCmd, control, request, o.timeout_s);
  if (!reply) return;
  const auto& c = reply->calibration();
  if (o.json) return print_json(kCmd, c);
  if (o.action == "save") std::cout << "saved the calibration in force to " << c.set_path() << "\n";
  if (o.action == "load")
    std::cout << "loaded " << c.set_path() << "; measurements from the next frame on use it\n";
  if (o.action == "cancel") std::cout << "cancelled: " << c.acquisition().message() << "\n";
  print_summary(c);
}

}  // namespace

void add_calibrate_command(CLI::App& app) {
  auto o = std::make_shared<CalibrateOptions>();
  auto* cmd = app.add_subcommand("calibrate", "Calibrate the running slopecastd: acquisitions and calibration sets");
  cmd->require_subcommand(1);
  auto common = [o](CLI::App* sub) {
    add_key_options(sub, o->keys);
    auto* config = sub->add_option("--config", o->config, "Take the control endpoint from this slopecastd config file")
                       ->check(CLI::ExistingFile);
    sub->add_option("--control", o->control, "Daemon control endpoint")->capture_default_str()->excludes(config);
    sub->add_flag("--json", o->json, "Print the daemon's reply as JSON (field names as in control.proto)");
    sub->add_option("--timeout-s", o->timeout_s, "Seconds to wait for each reply")
        ->capture_default_str()->check(CLI::PositiveNumber);
  };
  auto acquisition = [&](const char* name, const char* help) {
    auto* sub = cmd->add_subcommand(name, help);
    common(sub);
    sub->add_option("--frames", o->frames, "Frames to average")->capture_default_str()->check(CLI::Range(1, 100000));
    sub->add_flag("--no-wait", o->no_wait, "Start the acquisition and return (follow it with `calibrate show`)");
    sub->callback([o, name] {
      o->action = name;
      run_calibrate(*o);
    });
    return sub;
  };
  auto* dark = acquisition("dark", "Average frames with the light OFF into the dark");
  dark->add_flag("--bad-pixels", o->bad_pixels,
                 "Also map hot, cold and noisy pixels from the same frames (sigma clipping); they are replaced "
                 "by their neighbours' mean");
  dark->add_option("--sigma", o->sigma, "Bad-pixel threshold, clipped spreads")->capture_default_str()->check(CLI::PositiveNumber);
  acquisition("sky", "Average frames with the source off and the sky on into the sky frame (dark removed)");
  acquisition("reference", "Average the slopes of the reference source into the reference slopes");
  acquisition("valid-map", "Keep the subapertures whose mean flux reaches a fraction of the median")
      ->add_option("--fraction", o->fraction, "Fraction of the median lit flux")->capture_default_str()->check(CLI::Range(0.001, 1.0));
  acquisition("flat", "Average frames of even illumination into the flat field");
  for (auto [name, help] : {std::pair{"save", "Save the calibration in force as a set NAME under the daemon's calibration_dir"},
                            std::pair{"load", "Load set NAME from the daemon's calibration_dir and apply it"}}) {
    auto* sub = cmd->add_subcommand(name, help);
    common(sub);
    sub->add_option("name", o->name, "Set name (letters, digits, '.', '_', '-')")->required();
    sub->callback([o, name = std::string(name)] {
      o->action = name;
      run_calibrate(*o);
    });
  }
  for (auto [name, help] : {std::pair{"show", "Show the calibration in force and the last acquisition"},
                            std::pair{"cancel", "Cancel the running acquisition"}}) {
    auto* sub = cmd->add_subcommand(name, help);
    common(sub);
    sub->callback([o, name = std::string(name)] {
      o->action = name;
      run_calibrate(*o);
    });
  }
}

}  // namespace slopecast::cli

// `slopecast sim`: a stand-in lenslet camera. Publishes frames of
// pixel-integrated Gaussian spots at known sub-pixel offsets (new offsets
// every frame) on diffuse background light, with photon and read noise on a
// bias, at a fixed rate, in any pixel type and camera size; can write the
// true offsets to a CSV file and a mean dark frame to FITS. Other scenes
// stand in for a calibration session: a static lattice to register, no
// light for a dark, even light for a flat. `--config` takes
// the camera, the grid and the frames endpoint from a slopecastd config.
#include <fstream>
#include <optional>
#include <sstream>
#include <iostream>
#include <memory>
#include <thread>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/frame_publisher.h"
#include "client/lib/measurement_tally.h"
#include "client/sim/frame_bank.h"
#include "client/sim/lattice_field.h"
#include "client/cli/scenario_file.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/fits_image.h"
#include "daemon/io/wire_codec.h"
#include "slopecast/v1/recording.pb.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "sim";

struct SimOptions {
  std::string config;
  std::string scenario;
  std::string frames_out = io::kDefaultFramesEndpoint;
  int subapertures_x = 16, subapertures_y = 16, pitch_px = 15;
  int origin_x_px = 0, origin_y_px = 0;
  int width_px = 0, height_px = 0;  // 0: just the grid (origin + subapertures x pitch)
  std::string pixel_type = "u16";
  double rate_hz = 1000.0;
  std::uint64_t frames = 0;  // 0: until interrupted
  int distinct_frames = 200;
  double spot_sigma_px = 0.9;
  double photons = 5000.0;
  double background_e = 0.0;
  double max_offset_px = 1.5;
  double read_noise_e = 3.0;
  double bias_adu = 100.0;
  double gain_e_per_adu = 1.0;
  double full_scale_adu = 0.0;  // 0: the pixel type's full scale
  std::uint64_t seed = 1;
  std::string truth_csv;
  std::string truth_out;
  std::string write_dark;
  int dark_frames = 100;
  double wait_subscriber_s = 10.0;
  unsigned subscribers = 1;
  bool block_when_full = false;
  std::string source_id = "slopecast-sim";
  // What the camera sees: "spots" (a regular grid of spots at random
  // offsets, with truth), "lattice" (a static, turned, non-integer-pitch
  // lattice behind an obstructed pupil: what registration works on),
  // "dark" (no light) or "uniform" (even light, for a flat).
  std::string scene = "spots";
  sim::LatticeFieldSettings lattice;
  std::vector<std::string> dead;
  double uniform_e = 10000.0;
};

// "i,j" -> (i, j).
std::optional<std::pair<int, int>> parse_lenslet(const std::string& text) {
  int i = 0, j = 0;
  char comma = 0;
  std::istringstream in(text);
  if (!(in >> i >> comma >> j) || comma != ',' || !in.eof()) return std::nullopt;
  return std::pair{i, j};
}

void run_sim(SimOptions o) {
  if (!o.config.empty()) {
    auto c = read_daemon_config(kCmd, o.config);
    if (!c) return;
    const auto& p = c->pipeline;
    o.frames_out = c->endpoints.frames_in;
    o.width_px = p.camera.width_px;
    o.height_px = p.camera.height_px;
    o.pixel_type = std::string(core::pixel_format_name(p.camera.format));
    o.subapertures_x = p.grid.n_subap_x;
    o.subapertures_y = p.grid.n_subap_y;
    o.pitch_px = p.grid.pitch_px;
    o.origin_x_px = p.grid.origin_x_px;
    o.origin_y_px = p.grid.origin_y_px;
  }
  const auto format = core::parse_pixel_format(o.pixel_type);
  if (!format) return fail(kCmd, fmt::format("--pixel-type '{}' is not one of u8, u16, u32, f32", o.pixel_type));
  if (o.write_dark.empty() && !endpoint_ok(kCmd, "--frames-out", o.frames_out)) return;
  sim::SpotFieldSettings field;
  field.grid = core::LensletGrid{o.subapertures_x, o.subapertures_y, o.pitch_px, o.origin_x_px, o.origin_y_px};
  field.spot_sigma_px = o.spot_sigma_px;
  field.photons_per_spot = o.photons;
  field.max_offset_px = o.max_offset_px;
  core::CameraSpec camera{o.width_px ? o.width_px : o.origin_x_px + o.subapertures_x * o.pitch_px,
                          o.height_px ? o.height_px : o.origin_y_px + o.subapertures_y * o.pitch_px, *format};
  sim::DetectorModel detector;
  detector.read_noise_e = o.read_noise_e;
  detector.bias_adu = o.bias_adu;
  detector.gain_e_per_adu = o.gain_e_per_adu;
  const double type_full_scale = std::min(core::full_scale_adu(*format), 4294967295.0);
  detector.full_scale_adu = o.full_scale_adu > 0 ? o.full_scale_adu : type_full_scale;
  if (detector.full_scale_adu > type_full_scale)
    return fail(kCmd, fmt::format("--full-scale-adu {} exceeds what {} pixels hold ({})", detector.full_scale_adu,
                                  o.pixel_type, type_full_scale));
  if (auto e = core::validate(camera); !e.empty()) return fail(kCmd, e);
  if (auto e = core::validate(field.grid, camera); !e.empty()) return fail(kCmd, e);
  if (o.scene == "spots")
    if (auto e = sim::validate(field); !e.empty()) return fail(kCmd, e);
  if (auto e = sim::validate(detector); !e.empty()) return fail(kCmd, e);
  std::optional<ScenarioFile> scenario;
  if (!o.scenario.empty()) {
    auto read = read_scenario(o.scenario);
    if (auto* e = std::get_if<std::string>(&read)) return fail(kCmd, *e);
    scenario = std::get<ScenarioFile>(std::move(read));
    scenario->scene.rate_hz = o.rate_hz;
    scenario->scene.path_s = (o.frames > 0 ? std::min<double>(o.frames, o.distinct_frames) : o.distinct_frames) / o.rate_hz;
    if (auto e = sim::validate(scenario->scene, field.grid); !e.empty()) return fail(kCmd, o.scenario + ": " + e);
    const double bits_full = scenario->bit_depth ? std::ldexp(1.0, scenario->bit_depth) - 1 : type_full_scale;
    if (bits_full > type_full_scale)
      return fail(kCmd, fmt::format("{}: a {}-bit detector does not fit {} pixels", o.scenario, scenario->bit_depth,
                                    o.pixel_type));
    detector = scenario->detector;
    detector.full_scale_adu = bits_full;
    if (auto e = sim::validate(detector); !e.empty()) return fail(kCmd, o.scenario + ": " + e);
    o.scene = "turbulence";
  }
  if (o.scene != "spots" && o.scene != "lattice" && o.scene != "dark" && o.scene != "uniform" &&
      o.scene != "turbulence")
    return fail(kCmd, fmt::format("--scene '{}' is not one of spots, lattice, dark, uniform", o.scene));
  if (o.scene != "spots" && o.scene != "turbulence" && !o.truth_out.empty())
    return fail(kCmd, "--truth-out belongs to the spots and turbulence scenes");
  if (!o.truth_out.empty() && !endpoint_ok(kCmd, "--truth-out", o.truth_out)) return;
  if (o.scene != "spots" && o.scene != "turbulence" && !o.truth_csv.empty())
    return fail(kCmd, "--truth-csv belongs to --scene spots (the other scenes are static; their truth is the "
                      "lattice settings themselves)");
  o.lattice.width_px = camera.width_px;
  o.lattice.height_px = camera.height_px;
  o.lattice.spot_sigma_px = o.spot_sigma_px;
  o.lattice.photons_per_spot = o.photons;
  o.lattice.background_e = o.background_e;
  for (const auto& d : o.dead) {
    const auto ij = parse_lenslet(d);
    if (!ij) return fail(kCmd, fmt::format("--dead '{}': expected i,j (a lenslet's column and row)", d));
    o.lattice.dead.push_back(*ij);
  }
  if (o.scene == "lattice")
    if (auto e = sim::validate(o.lattice); !e.empty()) return fail(kCmd, "lattice: " + e);
  const auto keep_going = [] { return !stop_requested(); };

  if (!o.write_dark.empty()) {
    const auto dark = sim::make_mean_dark(detector, camera.width_px, camera.height_px, o.dark_frames,
                                          o.seed ^ 0xda4c, keep_going);
    if (dark.empty()) {
      std::cerr << "slopecast sim: stopped before the dark was complete; nothing written\n";
      return;
    }
    const io::FitsCard cards[] = {{"NCOMBINE", double(o.dark_frames), "dark exposures averaged"},
                                  {"BIAS", o.bias_adu, "[adu] simulated bias level"},
                                  {"RDNOISE", o.read_noise_e, "[e-] simulated read noise"}};
    if (auto e = io::write_fits_image(o.write_dark, camera.width_px, camera.height_px, dark, cards,
                                      "mean dark made by slopecast sim");
        !e.empty())
      return fail(kCmd, e);
    std::cout << fmt::format("wrote {} x {} mean of {} dark frames to {}\n", camera.width_px, camera.height_px,
                             o.dark_frames, o.write_dark);
    return;
  }

  std::ofstream truth;
  if (!o.truth_csv.empty()) {
    truth.open(o.truth_csv);
    if (!truth) return fail(kCmd, "cannot write truth CSV '" + o.truth_csv + "'");
    truth << (o.scene == "turbulence" ? "frame_seq,subaperture,true_dx_px,true_dy_px,illuminated\n"
                                      : "frame_seq,subaperture,true_dx_px,true_dy_px\n");
  }
  zmq::context_t ctx(1);
  std::unique_ptr<client::FramePublisher> pub;
  std::unique_ptr<client::FramePublisher> truth_pub;  // FrameTruth messages as single parts
  try {
    pub = std::make_unique<client::FramePublisher>(ctx, o.frames_out);
    if (!o.truth_out.empty()) truth_pub = std::make_unique<client::FramePublisher>(ctx, o.truth_out, 10000);
  } catch (const zmq::error_t& e) {
    return fail(kCmd, fmt::format("cannot bind {} / {}: {}", o.frames_out, o.truth_out, e.what()));
  }
  const int distinct =
      static_cast<int>(o.frames > 0 ? std::min<std::uint64_t>(o.frames, o.distinct_frames) : o.distinct_frames);
  std::string scene;
  if (o.scene == "spots")
    scene = fmt::format("{} x {} spots, sigma {} px, {} photons, background {} e-/px", o.subapertures_x,
                        o.subapertures_y, o.spot_sigma_px, o.photons, o.background_e);
  else if (o.scene == "turbulence")
    scene = fmt::format("turbulence from {}: r0 {} m at {} nm, L0 {} m, {} layer(s), D {} m, {} photons per "
                        "subaperture",
                        o.scenario, scenario->scene.r0_m, scenario->scene.r0_wavelength_nm,
                        scenario->scene.outer_scale_m, scenario->scene.layers.size(), scenario->scene.pupil_diameter_m,
                        scenario->scene.photons_per_subaperture);
  else if (o.scene == "lattice")
    scene = fmt::format("lattice of {} x {} lenslets, pitch {} px, rotation {} deg, pupil {} px ({} obstructed), "
                        "tilt ({}, {}) px",
                        o.lattice.lenslets_x, o.lattice.lenslets_y, o.lattice.pitch_px, o.lattice.rotation_deg,
                        o.lattice.pupil_diameter_px, o.lattice.obstruction, o.lattice.tilt_x_px, o.lattice.tilt_y_px);
  else
    scene = o.scene == "dark" ? "no light" : fmt::format("uniform light, {} e-/px", o.uniform_e);
  std::cout << fmt::format("rendering {} distinct {} x {} {} frames ({})...\n", distinct, camera.width_px,
                           camera.height_px, o.pixel_type, scene)
            << std::flush;
  sim::FrameBank bank;
  const std::size_t pixels = static_cast<std::size_t>(camera.width_px) * camera.height_px;
  if (o.scene == "spots") {
    bank = sim::make_frame_bank(field, detector, camera, o.background_e, distinct, o.seed, keep_going);
  } else if (o.scene == "turbulence") {
    sim::TurbulenceSim simulator(scenario->scene, field.grid, o.seed);
    bank = sim::make_turbulence_bank(simulator, detector, camera, distinct, o.seed ^ 0x5eed, keep_going);
  }
  else if (o.scene == "lattice")
    bank = sim::make_static_bank(sim::render_lattice_field(o.lattice).image_e, detector, camera, distinct, o.seed,
                                 keep_going);
  else
    bank = sim::make_static_bank(std::vector<double>(pixels, o.scene == "dark" ? 0.0 : o.uniform_e), detector,
                                 camera, distinct, o.seed, keep_going);
  if (stop_requested()) {
    std::cout << "stopped while rendering; sent 0 frames\n";
    return;
  }
  if (o.wait_subscriber_s > 0) {
    std::cout << "waiting for a subscriber on " << o.frames_out << "...\n" << std::flush;
    if (!pub->wait_for_subscribers(o.subscribers,
                                   std::chrono::milliseconds(static_cast<long>(o.wait_subscriber_s * 1000)))) {
      if (stop_requested()) {
        std::cout << "stopped while waiting for a subscriber; sent 0 frames\n";
        return;
      }
      return fail(kCmd, fmt::format("fewer than {} subscriber(s) on {} within {} s", o.subscribers, o.frames_out,
                                    o.wait_subscriber_s));
    }
    if (truth_pub &&
        !truth_pub->wait_for_subscriber(std::chrono::milliseconds(static_cast<long>(o.wait_subscriber_s * 1000)))) {
      if (stop_requested()) return;
      return fail(kCmd, fmt::format("no subscriber on --truth-out {} within {} s", o.truth_out, o.wait_subscriber_s));
    }
  }
  std::cout << fmt::format("publishing on {} at {} Hz{}\n", o.frames_out, o.rate_hz,
                           o.frames ? fmt::format(", {} frames", o.frames) : std::string(" until stopped"))
            << std::flush;

  using clock = std::chrono::steady_clock;
  const auto period = std::chrono::duration_cast<clock::duration>(std::chrono::duration<double>(1.0 / o.rate_hz));
  const auto start = clock::now();
  std::uint64_t sent = 0, dropped = 0, truth_dropped = 0;
  v1::FrameHeader header =
      client::make_frame_header(0, 0, camera.width_px, camera.height_px, io::to_wire(camera.format));
  header.set_exposure_us(1e6 / o.rate_hz);
  header.set_source_id(o.source_id);
  for (std::uint64_t seq = 0; (o.frames == 0 || seq < o.frames) && !stop_requested(); ++seq) {
    // Sleep in slices so that a stop is honoured promptly even at low rates.
    const auto due = start + period * static_cast<long>(seq);
    while (!stop_requested() && clock::now() < due)
      std::this_thread::sleep_for(std::min<clock::duration>(due - clock::now(), std::chrono::milliseconds(50)));
    if (stop_requested()) break;
    const std::size_t k = seq % bank.frames.size();
    header.set_seq(seq);
    header.set_camera_time_ns(client::wall_clock_ns());
    const auto& frame = bank.frames[k];
    const bool ok = o.block_when_full ? pub->publish_waiting(header, frame, keep_going)
                                      : pub->publish(header, frame);
    if (!ok) {
      if (!stop_requested()) ++dropped;
      continue;
    }
    ++sent;
    if (truth_pub && !bank.truth.empty()) {
      const auto& t = bank.truth[k];
      v1::FrameTruth ft;
      ft.set_frame_seq(seq);
      ft.set_n_subap_x(static_cast<std::uint32_t>(o.subapertures_x));
      ft.set_n_subap_y(static_cast<std::uint32_t>(o.subapertures_y));
      for (std::size_t i = 0; i < t.dx_px.size(); ++i) {
        ft.add_true_dx_px(static_cast<float>(t.dx_px[i]));
        ft.add_true_dy_px(static_cast<float>(t.dy_px[i]));
        ft.add_illuminated(bank.illuminated.empty() ? 1.0f : static_cast<float>(bank.illuminated[k][i]));
      }
      const std::string part[] = {ft.SerializeAsString()};
      if (!truth_pub->publish_parts(part)) ++truth_dropped;
    }
    if (truth.is_open() && !bank.truth.empty()) {  // only frames that left: what a test can expect to see measured
      const auto& t = bank.truth[k];
      for (std::size_t i = 0; i < t.dx_px.size(); ++i) {
        if (bank.illuminated.empty())
          truth << fmt::format("{},{},{:.6f},{:.6f}\n", seq, i, t.dx_px[i], t.dy_px[i]);
        else
          truth << fmt::format("{},{},{:.6f},{:.6f},{:.4f}\n", seq, i, t.dx_px[i], t.dy_px[i], bank.illuminated[k][i]);
      }
    }
  }
  const double elapsed = std::chrono::duration<double>(clock::now() - start).count();
  std::cout << fmt::format("sent {} frames in {:.2f} s ({:.1f} Hz); {} dropped because a subscriber's queue was "
                           "full{}\n",
                           sent, elapsed, elapsed > 0 ? sent / elapsed : 0.0, dropped,
                           stop_requested() ? "; stopped by a signal" : "");
  if (truth_dropped) std::cout << fmt::format("{} truth messages dropped at a full subscriber queue\n", truth_dropped);
}

}  // namespace

void add_sim_command(CLI::App& app) {
  auto o = std::make_shared<SimOptions>();
  auto* cmd = app.add_subcommand("sim", "Simulate a lenslet camera: publish frames of spots with known offsets");
  cmd->add_option("--config", o->config,
                  "Take the camera (size, pixel type), the lenslet grid and the frames endpoint from this "
                  "slopecastd config file; options given with it must not repeat them")
      ->check(CLI::ExistingFile);
  auto* frames_out = cmd->add_option("--frames-out", o->frames_out, "Endpoint to bind and publish frames on")->capture_default_str();
  auto* sx = cmd->add_option("--subapertures-x", o->subapertures_x, "Subapertures across")->capture_default_str()->check(CLI::Range(1, 4096));
  auto* sy = cmd->add_option("--subapertures-y", o->subapertures_y, "Subapertures down")->capture_default_str()->check(CLI::Range(1, 4096));
  auto* pitch = cmd->add_option("--pitch-px", o->pitch_px, "Subaperture box side, px")->capture_default_str()->check(CLI::Range(2, 1024));
  auto* ox = cmd->add_option("--origin-x-px", o->origin_x_px, "Column of the first box's first pixel")->capture_default_str()->check(CLI::Range(0, 16384));
  auto* oy = cmd->add_option("--origin-y-px", o->origin_y_px, "Row of the first box's first pixel")->capture_default_str()->check(CLI::Range(0, 16384));
  auto* w = cmd->add_option("--width-px", o->width_px, "Camera width, px (default: origin + subapertures x pitch)")->check(CLI::Range(1, 16384));
  auto* h = cmd->add_option("--height-px", o->height_px, "Camera height, px (default: origin + subapertures x pitch)")->check(CLI::Range(1, 16384));
  auto* type = cmd->add_option("--pixel-type", o->pixel_type, "Pixel type: u8, u16, u32 or f32")->capture_default_str();
  for (auto* opt : {frames_out, sx, sy, pitch, ox, oy, w, h, type}) opt->excludes(cmd->get_option("--config"));
  cmd->add_option("--rate-hz", o->rate_hz, "Frame rate")->capture_default_str()->check(CLI::Range(0.01, 100000.0));
  cmd->add_option("--frames", o->frames, "Frames to send (0: until Ctrl-C)")->capture_default_str();
  cmd->add_option("--distinct-frames", o->distinct_frames,
                  "Distinct frames rendered up front and cycled (seq k shows frame k mod this)")
      ->capture_default_str()->check(CLI::Range(1, 100000));
  cmd->add_option("--spot-sigma-px", o->spot_sigma_px, "Spot rms width, px")->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--photons", o->photons, "Expected photo-electrons per spot")->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--background-e-per-px", o->background_e,
                  "Diffuse background light on every pixel (sky, scattered light), expected photo-electrons")
      ->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--max-offset-px", o->max_offset_px, "Offsets drawn uniformly from [-max, max] px, per axis")
      ->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--read-noise-e", o->read_noise_e, "Read noise, e- rms per pixel")->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--bias-adu", o->bias_adu, "Bias level, ADU")->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--gain-e-per-adu", o->gain_e_per_adu, "Detector gain, e- per ADU")->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--full-scale-adu", o->full_scale_adu,
                  "Saturation level, ADU (default: the pixel type's full scale; e.g. 4095 for a 12-bit camera)")
      ->check(CLI::NonNegativeNumber);
  cmd->add_option("--seed", o->seed, "Random seed (same seed, same frames)")->capture_default_str();
  cmd->add_option("--truth-csv", o->truth_csv,
                  "Write the true offsets of every frame sent (frame_seq,subaperture,true_dx_px,true_dy_px)");
  cmd->add_option("--truth-out", o->truth_out,
                  "Also publish each frame's truth on this endpoint (bound here; one FrameTruth message per frame "
                  "sent, proto/slopecast/v1/recording.proto): `slopecast record --truth-from` keeps it");
  cmd->add_option("--write-dark", o->write_dark,
                  "Instead of publishing, write the mean of --dark-frames dark exposures (no light) of the "
                  "camera's size to this FITS file and exit");
  cmd->add_option("--dark-frames", o->dark_frames, "Dark exposures averaged by --write-dark")
      ->capture_default_str()->check(CLI::Range(1, 100000));
  cmd->add_option("--wait-subscriber-s", o->wait_subscriber_s,
                  "Wait up to this long for a subscriber before the first frame (0: do not wait)")
      ->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--subscribers", o->subscribers,
                  "Wait for this many subscribers (the daemon, a recorder, ...) before the first frame")
      ->capture_default_str()->check(CLI::Range(1, 64));
  cmd->add_flag("--block-when-full", o->block_when_full,
                "When a subscriber's queue is full, wait for room instead of dropping the frame (lossless: "
                "the rate then follows the slowest subscriber)");
  cmd->add_option("--source-id", o->source_id, "Text put in every frame header's source_id")->capture_default_str();
  auto* scenario = cmd->add_option("--scenario", o->scenario,
                  "Physical simulation from this TOML scenario (turbulence layers, pupil, optics, detector; see "
                  "the README): spots are Fourier-optics images of the turbulent wavefront, truth is each "
                  "subaperture's mean phase gradient. Frame k is at time k / rate")
      ->check(CLI::ExistingFile);
  cmd->add_option("--scene", o->scene,
                  "What the camera sees: spots (a regular grid, random offsets, with truth), lattice (a static "
                  "turned lattice behind an obstructed pupil, for registration), dark (no light), uniform (even "
                  "light, for a flat)")
      ->capture_default_str();
  auto& L = o->lattice;
  cmd->add_option("--lattice-pitch-px", L.pitch_px, "lattice: lenslet pitch on the camera, px (any real)")->capture_default_str();
  cmd->add_option("--lattice-rotation-deg", L.rotation_deg, "lattice: rotation, degrees (+x toward +y)")->capture_default_str();
  cmd->add_option("--lattice-origin-x-px", L.origin_x_px, "lattice: spot of lenslet (0, 0), x px")->capture_default_str();
  cmd->add_option("--lattice-origin-y-px", L.origin_y_px, "lattice: spot of lenslet (0, 0), y px")->capture_default_str();
  cmd->add_option("--lattice-lenslets-x", L.lenslets_x, "lattice: lenslets across")->capture_default_str();
  cmd->add_option("--lattice-lenslets-y", L.lenslets_y, "lattice: lenslets down")->capture_default_str();
  cmd->add_option("--pupil-centre-x-px", L.pupil_x_px, "lattice: pupil centre, x px")->capture_default_str();
  cmd->add_option("--pupil-centre-y-px", L.pupil_y_px, "lattice: pupil centre, y px")->capture_default_str();
  cmd->add_option("--pupil-diameter-px", L.pupil_diameter_px, "lattice: pupil diameter, px")->capture_default_str();
  cmd->add_option("--pupil-obstruction", L.obstruction, "lattice: central obstruction, fraction of the diameter")
      ->capture_default_str();
  cmd->add_option("--tilt-x-px", L.tilt_x_px, "lattice: every spot moved by this, x px (a wavefront tilt)")->capture_default_str();
  cmd->add_option("--tilt-y-px", L.tilt_y_px, "lattice: every spot moved by this, y px")->capture_default_str();
  cmd->add_option("--dead", o->dead, "lattice: lenslet i,j gives no light (repeat for several)");
  cmd->add_option("--uniform-e-per-px", o->uniform_e, "uniform: light per pixel, expected photo-electrons")
      ->capture_default_str()->check(CLI::NonNegativeNumber);
  // A scenario sets the light and the detector itself.
  for (const char* name : {"--spot-sigma-px", "--photons", "--background-e-per-px", "--max-offset-px", "--read-noise-e",
                           "--bias-adu", "--gain-e-per-adu", "--full-scale-adu", "--scene"})
    cmd->get_option(name)->excludes(scenario);
  cmd->callback([o] { run_sim(*o); });
}

}  // namespace slopecast::cli

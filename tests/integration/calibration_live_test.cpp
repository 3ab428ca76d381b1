// Calibrating a running daemon from the command line, as the README's
// walk-through does: the real slopecastd fed by `slopecast sim` (dark, then
// the turned lattice of tests/support/lattice_support.h), calibrated with
// `slopecast calibrate` and `slopecast register --live`, saved, and loaded
// by a restarted daemon that must then measure the same frames identically.
// Nothing here depends on machine speed: every step waits for the commands
// and messages it needs (bounded by generous deadlines), never on a sleep.
#include <catch2/catch.hpp>

#include <csignal>
#include <fstream>
#include <thread>

#include "client/lib/measurement_subscriber.h"
#include "daemon/io/calibration_set.h"
#include "daemon/io/fits_image.h"
#include "tests/integration/daemon_harness.h"

using namespace slopecast;
using namespace std::chrono_literals;
namespace fs = std::filesystem;

namespace {

const std::string kBench =
    "[camera]\nwidth_px = 400\nheight_px = 400\npixel_type = \"u16\"\n"
    "[lenslet_grid]\nsubapertures_x = 36\nsubapertures_y = 36\npitch_px = 10\norigin_x_px = 20\norigin_y_px = 20\n"
    "[daemon]\nframe_queue_depth = 2000\nmeasurement_queue_depth = 4000\n";

// `slopecast sim` for the bench: the lattice (or another scene), cycling
// `distinct` noisy exposures made from `seed`.
std::vector<std::string> sim_args(const testing::DaemonHarness& h, const std::string& scene, int frames, int distinct,
                                  int seed) {
  return {"sim", "--frames-out", h.frames_endpoint, "--width-px", "400", "--height-px", "400",
          "--subapertures-x", "36", "--subapertures-y", "36", "--pitch-px", "10",
          "--scene", scene, "--photons", "20000", "--spot-sigma-px", "1.1", "--background-e-per-px", "20",
          "--lattice-pitch-px", "10.37", "--lattice-rotation-deg", "0.4", "--lattice-origin-x-px", "16.3",
          "--lattice-origin-y-px", "12.6", "--pupil-centre-x-px", "201.3", "--pupil-centre-y-px", "198.7",
          "--pupil-diameter-px", "350", "--pupil-obstruction", "0.3", "--dead", "5,17", "--dead", "30,20",
          "--dead", "18,4", "--frames", std::to_string(frames), "--distinct-frames", std::to_string(distinct),
          "--seed", std::to_string(seed), "--rate-hz", "400", "--block-when-full"};
}

// Runs one `slopecast` command to completion; returns its exit status.
int run_cli(const testing::DaemonHarness& h, std::vector<std::string> args, const std::string& log_name) {
  args.push_back("--control");
  args.push_back(h.control_endpoint);
  testing::ChildProcess cli(SLOPECAST_PATH, args, h.dir / log_name);
  const auto status = cli.wait(120s);
  INFO(testing::read_log(h.dir / log_name));
  REQUIRE(status.has_value());
  if (*status != 0) UNSCOPED_INFO("slopecast " << args[0] << " said:\n" << testing::read_log(h.dir / log_name));
  return *status;
}

// Measurements of frames [0, n) of one sim run, by seq.
std::vector<v1::Measurement> collect(client::MeasurementSubscriber& sub, int n) {
  std::vector<v1::Measurement> got;
  const auto deadline = std::chrono::steady_clock::now() + 60s;
  while (static_cast<int>(got.size()) < n && std::chrono::steady_clock::now() < deadline)
    if (auto m = sub.receive(500ms)) got.push_back(std::move(*m));
  return got;
}

v1::CalibrationReply calibration_of(testing::DaemonHarness& h) { return h.status().calibration(); }

}  // namespace

TEST_CASE("a full calibration from the command line, saved and reloaded by a restarted daemon that measures the "
          "same frames identically",
          "[integration][calibration]") {
  testing::DaemonHarness a;
  REQUIRE(a.start(kBench + "[calibration]\ncalibration_dir = \"cal\"\n"));
  const auto t0 = std::chrono::steady_clock::now();

  {  // Dark, with the light off; then a sky frame (nothing but noise here).
    testing::ChildProcess sim(SLOPECAST_PATH, sim_args(a, "dark", 1000000, 4, 1), a.dir / "sim_dark.log");
    CHECK(run_cli(a, {"calibrate", "dark", "--frames", "30", "--bad-pixels"}, "dark.log") == 0);
    CHECK(run_cli(a, {"calibrate", "sky", "--frames", "10"}, "sky.log") == 0);
  }
  {  // A flat under even light.
    testing::ChildProcess sim(SLOPECAST_PATH, sim_args(a, "uniform", 1000000, 4, 5), a.dir / "sim_flat.log");
    CHECK(run_cli(a, {"calibrate", "flat", "--frames", "10"}, "flat.log") == 0);
  }
  {  // Registration, valid map and reference slopes on the lattice.
    testing::ChildProcess sim(SLOPECAST_PATH, sim_args(a, "lattice", 1000000, 8, 2), a.dir / "sim_lattice.log");
    CHECK(run_cli(a, {"register", "--live", "--frames", "10"}, "register.log") == 0);
    CHECK(run_cli(a, {"calibrate", "valid-map", "--frames", "10"}, "valid.log") == 0);
    CHECK(run_cli(a, {"calibrate", "reference", "--frames", "40"}, "reference.log") == 0);
  }
  CHECK(run_cli(a, {"calibrate", "save", "bench"}, "save.log") == 0);
  const double took_s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  WARN("full calibration (dark, sky, flat, registration, valid map, reference, save) took " << took_s << " s");

  const v1::CalibrationReply c = calibration_of(a);
  REQUIRE(c.has_lattice());
  INFO("pitch " << c.lattice().pitch_px() << " rotation " << c.lattice().rotation_deg());
  CHECK(c.lattice().pitch_px() == Approx(10.37).margin(0.01));
  CHECK(c.lattice().rotation_deg() == Approx(0.4).margin(0.05));
  CHECK(c.reference_slopes());
  CHECK(c.dark());
  CHECK(c.sky());
  CHECK(c.flat());
  CHECK(c.subapertures_in_map() > 800u);
  const fs::path set = a.dir / "cal" / "bench";
  for (const char* f : {"calibration.toml", "layout.fits", "valid_map.fits", "reference_slopes.fits", "dark.fits",
                        "sky.fits", "flat.fits", "bad_pixels.fits"})
    CHECK(fs::exists(set / f));
  CHECK_FALSE(fs::exists(a.dir / "cal" / "bench.partial"));

  // The same 8 frames through the calibrated daemon ...
  std::vector<v1::Measurement> before, after;
  {
    client::MeasurementSubscriber sub(a.ctx, a.measurements_endpoint);
    REQUIRE(a.wait_for_subscribers(1));
    testing::ChildProcess sim(SLOPECAST_PATH, sim_args(a, "lattice", 8, 8, 7), a.dir / "sim_same.log");
    before = collect(sub, 8);
  }
  REQUIRE(a.stop(10s) == 0);
  // ... and through a new daemon started from the saved set.
  testing::DaemonHarness b;
  REQUIRE(b.start(kBench + "[calibration]\nset = \"" + set.string() + "\"\n"));
  {
    client::MeasurementSubscriber sub(b.ctx, b.measurements_endpoint);
    REQUIRE(b.wait_for_subscribers(1));
    testing::ChildProcess sim(SLOPECAST_PATH, sim_args(b, "lattice", 8, 8, 7), b.dir / "sim_same.log");
    after = collect(sub, 8);
  }
  REQUIRE(before.size() == 8u);
  REQUIRE(after.size() == 8u);
  int valid = 0;
  for (int k = 0; k < 8; ++k) {
    CHECK(before[k].frame_seq() == after[k].frame_seq());
    CHECK(before[k].n_subap_x() == after[k].n_subap_x());
    CHECK(std::equal(before[k].slope_x().begin(), before[k].slope_x().end(), after[k].slope_x().begin(),
                     after[k].slope_x().end()));
    CHECK(std::equal(before[k].slope_y().begin(), before[k].slope_y().end(), after[k].slope_y().begin(),
                     after[k].slope_y().end()));
    CHECK(std::equal(before[k].flags().begin(), before[k].flags().end(), after[k].flags().begin(),
                     after[k].flags().end()));
    valid = static_cast<int>(after[k].n_valid());
  }
  CHECK(valid > 800);
  // A flat wavefront after the reference: slopes near zero (photon and
  // read noise of one frame, ~0.011 px per slope, tests/unit/core/calibration_test).
  CHECK(after[0].slope_rms_x() < 0.02f);
  CHECK(after[0].slope_rms_y() < 0.02f);
}

TEST_CASE("a calibration set that does not fit is refused over control while measurements go on unchanged",
          "[integration][calibration]") {
  testing::DaemonHarness h;
  REQUIRE(h.start(kBench + "[calibration]\ncalibration_dir = \"cal\"\n"));
  // A set made for a 200 x 200 camera, and one whose valid map has the wrong shape.
  io::CalibrationSet small;
  small.camera_width_px = small.camera_height_px = 200;
  small.grid = core::LensletGrid{10, 10, 10, 0, 0};
  small.layout = core::regular_layout(small.grid);
  REQUIRE(io::save_calibration_set(small, h.dir / "cal" / "small").empty());
  io::CalibrationSet odd;
  odd.camera_width_px = odd.camera_height_px = 400;
  odd.grid = core::LensletGrid{36, 36, 10, 0, 0};
  odd.layout = core::regular_layout(core::LensletGrid{36, 36, 10, 20, 20});
  odd.valid_map.assign(36 * 36, 1);
  REQUIRE(io::save_calibration_set(odd, h.dir / "cal" / "odd").empty());
  {  // Damage the valid map: a 35 x 36 image in its place.
    std::vector<float> wrong(35 * 36, 1.0f);
    REQUIRE(io::write_fits_cube(h.dir / "cal" / "odd" / "valid_map.fits", 35, 36, 1, wrong, io::FitsPixel::kU8).empty());
  }

  client::MeasurementSubscriber sub(h.ctx, h.measurements_endpoint);
  REQUIRE(h.wait_for_subscribers(1));
  testing::ChildProcess sim(SLOPECAST_PATH, sim_args(h, "lattice", 1000000, 4, 3), h.dir / "sim.log");
  auto first = sub.receive(30s);
  REQUIRE(first);
  const auto generation = first->settings_generation();

  for (auto [name, expect] : {std::pair{"small", "200 x 200"}, std::pair{"odd", "valid map"},
                              std::pair{"missing", "no calibration.toml"}, std::pair{"../escape", "not a set name"}}) {
    v1::ControlRequest req;
    req.mutable_calibration()->set_load(name);
    auto r = h.control().call(req, 2s);
    REQUIRE(std::holds_alternative<v1::ControlReply>(r));
    const auto& reply = std::get<v1::ControlReply>(r);
    INFO(name << ": " << reply.error());
    CHECK_FALSE(reply.ok());
    CHECK_THAT(reply.error(), Catch::Contains(expect));
  }
  // The daemon goes on measuring with the calibration it had.
  for (int k = 0; k < 20; ++k) {
    auto m = sub.receive(30s);
    REQUIRE(m);
    CHECK(m->settings_generation() == generation);
    CHECK(m->n_subap_x() == 36u);
  }
  CHECK(h.status().calibration().layout() == "regular grid");
}

TEST_CASE("a stop during an acquisition leaves no file, and Ctrl-C on the command cancels it in the daemon",
          "[integration][calibration]") {
  testing::DaemonHarness h;
  REQUIRE(h.start(kBench + "[calibration]\ncalibration_dir = \"cal\"\n"));
  testing::ChildProcess sim(SLOPECAST_PATH, sim_args(h, "dark", 1000000, 4, 4), h.dir / "sim.log");

  // The command follows a long acquisition; Ctrl-C cancels it in the daemon.
  testing::ChildProcess cli(SLOPECAST_PATH,
                            {"calibrate", "dark", "--frames", "100000", "--control", h.control_endpoint},
                            h.dir / "cli.log");
  const auto deadline = std::chrono::steady_clock::now() + 30s;
  while (std::chrono::steady_clock::now() < deadline && calibration_of(h).acquisition().frames_done() < 3)
    std::this_thread::sleep_for(20ms);
  REQUIRE(calibration_of(h).acquisition().state() == v1::ACQUISITION_STATE_RUNNING);
  cli.signal(SIGINT);
  CHECK(cli.wait(10s) == 130);
  CHECK(calibration_of(h).acquisition().state() == v1::ACQUISITION_STATE_CANCELLED);
  INFO(testing::read_log(h.dir / "cli.log"));
  CHECK_THAT(testing::read_log(h.dir / "cli.log"), Catch::Contains("cancelled in the daemon"));

  // SIGTERM to the daemon in the middle of another acquisition.
  v1::ControlRequest start;
  start.mutable_calibration()->mutable_start()->set_kind(v1::ACQUISITION_KIND_DARK);
  start.mutable_calibration()->mutable_start()->set_frames(100000);
  auto r = h.control().call(start, 2s);
  REQUIRE(std::holds_alternative<v1::ControlReply>(r));
  REQUIRE(std::get<v1::ControlReply>(r).ok());
  while (std::chrono::steady_clock::now() < deadline + 30s && calibration_of(h).acquisition().frames_done() < 3)
    std::this_thread::sleep_for(20ms);
  CHECK(h.stop(10s) == 0);
  // Nothing was written: no set, no partial file, not even the folder.
  CHECK_FALSE(fs::exists(h.dir / "cal"));
}

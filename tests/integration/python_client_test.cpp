// The Python package (client/python) against the real daemon:
//  - the example controller reconstructs a known static wavefront from the
//    daemon's measurements of simulated frames;
//  - frames published from numpy arrays come back measured, and control
//    requests are answered (tests/integration/python_client_check.py).
// Needs Debian's python3-zmq, python3-protobuf and python3-numpy (the test
// mode of .ci/quickstart.sh installs them).
#include <catch2/catch.hpp>

#include <csignal>
#include <fstream>
#include <regex>

#include "tests/integration/daemon_harness.h"

using namespace slopecast;
using namespace std::chrono_literals;

namespace {

std::vector<std::string> python(const std::string& script, std::vector<std::string> args) {
  std::vector<std::string> out = {std::string("PYTHONPATH=") + SLOPECAST_PYTHON_DIR, "/usr/bin/python3", script};
  out.insert(out.end(), args.begin(), args.end());
  return out;
}

double coefficient(const std::string& text, const std::string& name) {
  const std::regex re("  " + name + " ([-+][0-9.]+)");
  std::smatch m;
  REQUIRE(std::regex_search(text, m, re));
  return std::stod(m[1]);
}

}  // namespace

TEST_CASE("the Python example controller recovers a known wavefront from the daemon's slopes", "[integration][python]") {
  testing::DaemonHarness h;
  REQUIRE(h.start("[camera]\nwidth_px = 240\nheight_px = 240\npixel_type = \"u16\"\n"
                  "[lenslet_grid]\nsubapertures_x = 16\nsubapertures_y = 16\npitch_px = 15\n"
                  "[calibration]\npupil_centre_x_px = 120\npupil_centre_y_px = 120\npupil_diameter_px = 240\n"
                  "pupil_min_area_fraction = 0.999\n"
                  "[optics]\nslope_unit = \"nm\"\npixel_size_um = 10\nlenslet_focal_length_mm = 5.2\n"
                  "lenslet_pitch_um = 150\n"));
  // A static wavefront (no turbulence): 50 nm of tip, 100 nm of defocus,
  // -40 nm of coma (Noll j = 7), seen at 635 nm with 2.2 px per lambda/d,
  // so 288.6 nm of OPD per px, as the [optics] above give (288.5).
  std::ofstream(h.dir / "static.toml") << "[pupil]\ndiameter_m = 1.2\n[aberrations]\nzernike_nm = [0, 50, 0, 100, 0, 0, -40]\n"
                                          "[optics]\nwavelength_nm = 635\npixels_per_lambda_over_d = 2.2\n"
                                          "[light]\nphotons_per_subaperture = 50000\n[detector]\nread_noise_e = 1\n";
  testing::ChildProcess sim(SLOPECAST_PATH,
                            {"sim", "--config", (h.dir / "slopecastd.toml").string(), "--scenario",
                             (h.dir / "static.toml").string(), "--rate-hz", "100", "--distinct-frames", "5"},
                            h.dir / "sim.log");
  const std::string script = std::string(SLOPECAST_SOURCE_DIR) + "/client/python/examples/modal_controller.py";
  testing::ChildProcess example("/usr/bin/env",
                                python(script, {"--measurements", h.measurements_endpoint, "--frames", "20",
                                                "--modes", "10"}),
                                h.dir / "example.log");
  const auto rc = example.wait(60s);
  sim.signal(SIGTERM);
  (void)sim.wait(10s);
  const std::string said = testing::read_log(h.dir / "example.log");
  INFO("example said:\n" << said << "\nsim log:\n" << testing::read_log(h.dir / "sim.log"));
  REQUIRE(rc == 0);
  // The CoG reads sinc^2 spots in boxes of 6.8 lambda/d about 4 % short
  // (tests/REFERENCES.md R13.3), and only fully lit subapertures are used:
  // within 10 % of the modes put in, the absent ones within 5 nm.
  CHECK(coefficient(said, "tip \\(Z2\\)") == Approx(50).epsilon(0.10));
  CHECK(coefficient(said, "Z4") == Approx(100).epsilon(0.10));
  CHECK(coefficient(said, "Z7") == Approx(-40).epsilon(0.10));
  CHECK(std::abs(coefficient(said, "Z5")) < 5);
  CHECK(std::abs(coefficient(said, "Z8")) < 5);
}

TEST_CASE("frames published from numpy are measured, and control works, from Python", "[integration][python]") {
  testing::DaemonHarness h;
  REQUIRE(h.start("[camera]\nwidth_px = 96\nheight_px = 96\npixel_type = \"u16\"\n"
                  "[lenslet_grid]\nsubapertures_x = 8\nsubapertures_y = 8\npitch_px = 12\n"
                  "[daemon]\nsensor_name = \"python-bench\"\nframe_queue_depth = 100\n"));
  const std::string script = std::string(SLOPECAST_SOURCE_DIR) + "/tests/integration/python_client_check.py";
  testing::ChildProcess check("/usr/bin/env",
                              python(script, {h.frames_endpoint, h.measurements_endpoint, h.control_endpoint}),
                              h.dir / "check.log");
  const auto rc = check.wait(60s);
  INFO("python said:\n" << testing::read_log(h.dir / "check.log") << "\ndaemon log:\n" << h.log());
  CHECK(rc == 0);
}

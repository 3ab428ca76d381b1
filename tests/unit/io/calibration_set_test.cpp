// Calibration sets on disk: round trips, refusals, hand-written layouts, and
// the FITS files checked by an independent implementation (astropy, from
// Debian's python3-astropy) in both directions.
#include <catch2/catch.hpp>

#include <cstdlib>
#include <fstream>
#include <random>

#include "daemon/core/calibration/bad_pixels.h"
#include "daemon/io/calibration_set.h"
#include "daemon/io/fits_image.h"
#include "tests/support/temp_dir.h"

using namespace slopecast;
namespace fs = std::filesystem;

namespace {

// 3 x 2 subapertures of 2 px on a 5 x 4 camera: small enough to list every
// value. The third column of boxes starts at x 3 (x 4 would leave the frame).
io::CalibrationSet small_set() {
  io::CalibrationSet s;
  s.camera_width_px = 5;
  s.camera_height_px = 4;
  s.grid = core::LensletGrid{3, 2, 2, 0, 0};
  for (int iy = 0; iy < 2; ++iy)
    for (int ix = 0; ix < 3; ++ix) s.layout.push_back({2 * ix, 2 * iy, 2, 2, 0.5 + 2 * ix, 0.5 + 2 * iy});
  s.layout[1].ref_x = 2.6;
  s.layout[2].ref_x = 4.4;
  s.layout[2].x0 = 3;
  s.layout[5].x0 = 3;
  s.valid_map = {1, 0, 1, 1, 1, 0};
  s.reference_slope_x_px = {0.1f, -0.2f, 0.3f, 0.0f, 0.05f, -0.5f};
  s.reference_slope_y_px = {1, 2, 3, 4, 5, 6};
  for (int k = 0; k < 20; ++k) s.dark_adu.push_back(0.5f * k - 3.0f);
  s.sky_adu.assign(20, 2.5f);
  s.sky_adu[0] = 7.0f;
  s.flat.assign(20, 1.0f);
  s.flat[7] = 1.25f;
  s.bad_pixels.assign(20, 0);
  s.bad_pixels[3] = 1;
  s.bad_pixels[19] = 4;
  s.lattice = core::LatticeFit{2.01, 0.4, 0.5, 0.5, 0.003, 6, 6};
  s.made["dark"] = {"2026-12-02T07:30:00", 100, 0.002, "slopecast calibrate dark --frames 100"};
  s.made["layout"] = {"2026-12-02T07:31:00", 20, 0.002, "slopecast register --live"};
  return s;
}

const core::CameraSpec kCamera{5, 4, core::PixelFormat::kU16};

}  // namespace

TEST_CASE("a calibration set reads back exactly as saved", "[calibration_set]") {
  testing::TempDir dir;
  io::CalibrationSet s = small_set();
  REQUIRE(io::save_calibration_set(s, dir / "set").empty());
  auto r = io::load_calibration_set(dir / "set", kCamera);
  if (auto* e = std::get_if<std::string>(&r)) FAIL(*e);
  const auto& t = std::get<io::CalibrationSet>(r);
  CHECK(t.layout == s.layout);
  CHECK(t.valid_map == s.valid_map);
  CHECK(t.reference_slope_x_px == s.reference_slope_x_px);
  CHECK(t.reference_slope_y_px == s.reference_slope_y_px);
  CHECK(t.dark_adu == s.dark_adu);
  CHECK(t.sky_adu == s.sky_adu);
  CHECK(t.flat == s.flat);
  CHECK(t.bad_pixels == s.bad_pixels);
  REQUIRE(t.lattice);
  CHECK(t.lattice->pitch_px == Approx(2.01).margin(1e-6));
  CHECK(t.made.at("dark").command == "slopecast calibrate dark --frames 100");
  CHECK(t.made.at("dark").frames == 100);
  CHECK(t.made.at("layout").created_utc == "2026-12-02T07:31:00");

  // Saving again replaces the set whole, leaving nothing beside it.
  s.valid_map.clear();
  s.flat.clear();
  REQUIRE(io::save_calibration_set(s, dir / "set").empty());
  CHECK_FALSE(fs::exists(dir / "set" / "valid_map.fits"));
  CHECK_FALSE(fs::exists(dir / "set" / "flat.fits"));
  CHECK_FALSE(fs::exists(dir / "set.partial"));
  CHECK_FALSE(fs::exists(dir / "set.previous"));
  auto again = io::load_calibration_set(dir / "set", kCamera);
  REQUIRE(std::holds_alternative<io::CalibrationSet>(again));
  CHECK(std::get<io::CalibrationSet>(again).valid_map.empty());
}

TEST_CASE("a calibration set that does not fit is refused with the reason", "[calibration_set]") {
  testing::TempDir dir;
  REQUIRE(io::save_calibration_set(small_set(), dir / "set").empty());
  auto refused = [&](const core::CameraSpec& cam) {
    auto r = io::load_calibration_set(dir / "set", cam);
    REQUIRE(std::holds_alternative<std::string>(r));
    return std::get<std::string>(r);
  };
  CHECK_THAT(refused({6, 4, core::PixelFormat::kU16}), Catch::Contains("made for a 5 x 4 camera"));
  CHECK_THAT(std::get<std::string>(io::load_calibration_set(dir / "nothing", kCamera)),
             Catch::Contains("no calibration.toml"));

  const auto manifest = dir / "set" / "calibration.toml";
  std::string text;
  {
    std::ifstream in(manifest);
    text.assign(std::istreambuf_iterator<char>(in), {});
  }
  auto with = [&](const std::string& from, const std::string& to) {
    std::string t = text;
    t.replace(t.find(from), from.size(), to);
    std::ofstream(manifest) << t;
    return refused(kCamera);
  };
  CHECK_THAT(with("format = 1", "format = 2"), Catch::Contains("format 2"));
  CHECK_THAT(with("box_px = 2", "box_px = 2\ncolour = \"blue\""), Catch::Contains("unknown manifest key 'colour'"));
  CHECK_THAT(with("subapertures_x = 3", "subapertures_x = 4"), Catch::Contains("the layout has 6 subapertures"));
  CHECK_THAT(with("[files.dark]", "[files.darkness]"), Catch::Contains("unknown product"));
  std::ofstream(manifest) << text;
  // A valid map of the wrong shape, and a bad-pixel map holding a 9.
  std::vector<float> wrong(4, 1.0f);
  REQUIRE(io::write_fits_cube(dir / "set" / "valid_map.fits", 2, 2, 1, wrong, io::FitsPixel::kU8).empty());
  CHECK_THAT(refused(kCamera), Catch::Contains("valid map"));
  REQUIRE(io::save_calibration_set(small_set(), dir / "set").empty());
  std::vector<float> nine(20, 0.0f);
  nine[4] = 9.0f;
  REQUIRE(io::write_fits_cube(dir / "set" / "bad_pixels.fits", 5, 4, 1, nine, io::FitsPixel::kU8).empty());
  CHECK_THAT(refused(kCamera), Catch::Contains("bad-pixel map"));

  // Applying to settings whose centroider cannot use the box size.
  REQUIRE(io::save_calibration_set(small_set(), dir / "set").empty());
  core::PipelineSettings ps;
  ps.camera = kCamera;
  ps.grid = core::LensletGrid{2, 2, 2, 0, 0};
  ps.background = core::BackgroundMode::kNone;
  const auto before = ps.grid;
  auto loaded = std::get<io::CalibrationSet>(io::load_calibration_set(dir / "set", kCamera));
  loaded.reference_slope_x_px.pop_back();
  CHECK_THAT(io::apply_calibration(loaded, ps), Catch::Contains("reference slopes"));
  CHECK(ps.grid.n_subap_x == before.n_subap_x);  // unchanged
}

TEST_CASE("a layout written by hand as CSV", "[calibration_set][layout]") {
  testing::TempDir dir;
  const auto write = [&](const std::string& text) {
    std::ofstream(dir / "layout.csv") << text;
    return io::read_layout_file(dir / "layout.csv");
  };
  auto ok = write("# two boxes\nx0, y0, width, height, ref_x, ref_y\n10,20,8,8,13.5,23.5\r\n18,20,8,8,21.75,23.5\n");
  REQUIRE(std::holds_alternative<std::vector<core::SubapertureBox>>(ok));
  const auto& boxes = std::get<std::vector<core::SubapertureBox>>(ok);
  REQUIRE(boxes.size() == 2u);
  CHECK(boxes[1] == core::SubapertureBox{18, 20, 8, 8, 21.75, 23.5});
  CHECK_THAT(std::get<std::string>(write("x,y\n1,2\n")), Catch::Contains("expected the header"));
  CHECK_THAT(std::get<std::string>(write("x0,y0,width,height,ref_x,ref_y\n1,2,3,4.5,5,6\n")),
             Catch::Contains("line 2"));
  CHECK_THAT(std::get<std::string>(write("x0,y0,width,height,ref_x,ref_y\n1,2,3,4,5,6,7\n")),
             Catch::Contains("more than six"));
  CHECK_THAT(std::get<std::string>(write("")), Catch::Contains("empty"));
  CHECK_THAT(std::get<std::string>(io::read_layout_file(dir / "none.csv")), Catch::Contains("cannot read"));
}

TEST_CASE("FITS files from slopecast read correctly in astropy, and astropy's read correctly in slopecast",
          "[calibration_set][fits][astropy]") {
  testing::TempDir dir;
  // FITS 4.0 sec. 5.3: unsigned 16-bit values 0..65535, including both ends
  // and the two around the BZERO offset.
  const std::vector<float> u16 = {0, 1, 2, 32767, 32768, 65535};
  REQUIRE(io::write_fits_cube(dir / "u16.fits", 3, 2, 1, u16, io::FitsPixel::kU16).empty());
  REQUIRE(io::save_calibration_set(small_set(), dir / "set").empty());
  // 10 000 values of a Gaussian of mean 100 and rms 3, and 60 outliers.
  std::vector<float> values;
  std::mt19937_64 rng(5);
  std::normal_distribution<double> g(100.0, 3.0);
  for (int k = 0; k < 10000; ++k) values.push_back(static_cast<float>(g(rng)));
  for (int k = 0; k < 60; ++k) values.push_back(static_cast<float>(112.0 + 7.0 * k));
  REQUIRE(io::write_fits_image(dir / "clip.fits", 20, 503, values).empty());  // 10 060 values

  const std::string script = std::string(SLOPECAST_SOURCE_DIR) + "/tests/unit/io/astropy_fits_check.py";
  const std::string cmd = "/usr/bin/python3 " + script + " " + dir.path().string() + " > " +
                          (dir / "astropy.log").string() + " 2>&1";
  const int rc = std::system(cmd.c_str());
  std::ifstream log(dir / "astropy.log");
  const std::string text{std::istreambuf_iterator<char>(log), {}};
  INFO("astropy said: " << text
                        << "\n(this test needs Debian's python3-astropy for /usr/bin/python3; `bash "
                           ".ci/quickstart.sh test` installs it)");
  REQUIRE(rc == 0);

  // Sigma clipping (3 sigma, 5 rounds, median centre, population std) as
  // astropy.stats.sigma_clip computes it on the same values.
  {
    std::ifstream in(dir / "clip.txt");
    double centre = 0, spread = 0;
    std::size_t kept = 0;
    REQUIRE(in >> centre >> spread >> kept);
    const core::SigmaClipped ours = core::sigma_clip(values, 3.0, 5);
    CHECK(ours.kept == kept);
    CHECK(ours.centre == Approx(centre).epsilon(1e-6));
    CHECK(ours.spread == Approx(spread).epsilon(1e-6));
  }

  auto u = io::read_fits_image(dir / "astropy_u16.fits");
  REQUIRE(std::holds_alternative<io::FitsImage>(u));
  CHECK(std::get<io::FitsImage>(u).pixels == std::vector<float>{0, 1, 40000, 65535, 7, 8});
  auto f = io::read_fits_image(dir / "astropy_f64.fits");
  REQUIRE(std::holds_alternative<io::FitsImage>(f));
  CHECK(std::get<io::FitsImage>(f).pixels == std::vector<float>{1.5f, -2.25f, 3e4f, 0.125f});
  auto layout = io::read_layout_file(dir / "astropy_layout.fits");
  if (auto* e = std::get_if<std::string>(&layout)) FAIL(*e);
  const auto& boxes = std::get<std::vector<core::SubapertureBox>>(layout);
  REQUIRE(boxes.size() == 2u);
  CHECK(boxes[0] == core::SubapertureBox{10, 30, 8, 8, 13.5, 33.5});
  CHECK(boxes[1] == core::SubapertureBox{20, 30, 8, 8, 23.25, 33.75});
}

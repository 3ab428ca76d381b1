// Registration on simulated spot patterns: the lattice the simulator drew
// (client/sim/lattice_field.h, its own closed-form positions) is the
// reference. Tolerances are the calibration issue's acceptance figures:
// pitch 0.01 px, rotation 0.05 degrees, origin 0.05 px.
#include <catch2/catch.hpp>

#include <cmath>
#include <numbers>

#include "daemon/core/geometry/registration.h"
#include "tests/support/lattice_support.h"

using namespace slopecast;

namespace {

std::vector<float> as_float(const std::vector<std::uint16_t>& px) { return {px.begin(), px.end()}; }

// Distance from (x, y) to the nearest lattice point of the simulated field.
double lattice_miss(const sim::LatticeFieldSettings& s, double x, double y) {
  const double t = s.rotation_deg * std::numbers::pi / 180.0, c = s.pitch_px * std::cos(t),
               d = s.pitch_px * std::sin(t);
  const double dx = x - s.origin_x_px, dy = y - s.origin_y_px, p2 = c * c + d * d;
  const double i = std::round((c * dx + d * dy) / p2), j = std::round((-d * dx + c * dy) / p2);
  return std::hypot(x - (s.origin_x_px + c * i - d * j), y - (s.origin_y_px + d * i + c * j));
}

core::Registration run(const std::vector<float>& img, const sim::LatticeFieldSettings& s) {
  auto r = core::register_lattice(img, s.width_px, s.height_px, {});
  if (auto* e = std::get_if<std::string>(&r)) FAIL(*e);
  return std::get<core::Registration>(r);
}

}  // namespace

TEST_CASE("registration recovers pitch, rotation and origin of a turned lattice behind an obstructed pupil",
          "[registration]") {
  auto s = testing::tilted_bench();
  const double angle = GENERATE(0.4, -0.4, 1.7);
  s.rotation_deg = angle;
  const auto field = sim::render_lattice_field(s);
  std::mt19937_64 rng(11);
  const auto img = as_float(testing::expose_u16(field, testing::bench_detector(), rng));
  const core::Registration r = run(img, s);
  INFO("rotation " << angle << " deg; fitted pitch " << r.fit.pitch_px << " rotation " << r.fit.rotation_deg
                   << " residual " << r.fit.residual_rms_px << " spots " << r.fit.spots_used << "/"
                   << r.fit.spots_found);
  WARN("rotation " << angle << " deg: pitch error " << r.fit.pitch_px - s.pitch_px << " px, rotation error "
                    << r.fit.rotation_deg - s.rotation_deg << " deg, origin error "
                    << lattice_miss(s, r.fit.origin_x_px, r.fit.origin_y_px) << " px, residual "
                    << r.fit.residual_rms_px << " px rms");
  CHECK(r.fit.pitch_px == Approx(s.pitch_px).margin(0.01));
  CHECK(r.fit.rotation_deg == Approx(s.rotation_deg).margin(0.05));
  CHECK(lattice_miss(s, r.fit.origin_x_px, r.fit.origin_y_px) < 0.05);
  // Photon + read noise on a 20 000-photon spot of sigma 1.1 px put each
  // centroid ~0.01 px off; the residual shows no model error on top.
  CHECK(r.fit.residual_rms_px < 0.03);
  // Every lattice point the layout carries is a lattice point of the field.
  for (const auto& b : r.layout) CHECK(lattice_miss(s, b.ref_x, b.ref_y) < 0.05);

  // The valid map holds the lit lenslets: dead ones out, the pupil's
  // hole out, every spot the simulator drew at >= 30 % light in.
  int lit = 0, kept_lit = 0;
  for (const auto& spot : field.spots) {
    if (spot.photons < 0.3 * s.photons_per_spot) continue;
    ++lit;
    bool kept = false;
    for (std::size_t k = 0; k < r.layout.size(); ++k)
      if (std::hypot(r.layout[k].ref_x - spot.x, r.layout[k].ref_y - spot.y) < 0.05 && r.valid_map[k]) kept = true;
    kept_lit += kept;
    if (!kept) UNSCOPED_INFO("lenslet (" << spot.i << ", " << spot.j << ") at (" << spot.x << ", " << spot.y << ") with " << spot.photons << " photons is not kept");
  }
  CHECK(kept_lit == lit);
  for (auto [di, dj] : s.dead) {
    const double t = s.rotation_deg * std::numbers::pi / 180.0;
    const double x = s.origin_x_px + s.pitch_px * (di * std::cos(t) - dj * std::sin(t));
    const double y = s.origin_y_px + s.pitch_px * (di * std::sin(t) + dj * std::cos(t));
    for (std::size_t k = 0; k < r.layout.size(); ++k)
      if (std::hypot(r.layout[k].ref_x - x, r.layout[k].ref_y - y) < 0.05) CHECK(r.valid_map[k] == 0);
  }
  int centre_in = 0;  // lenslets in the obstruction's shadow
  for (std::size_t k = 0; k < r.layout.size(); ++k)
    if (std::hypot(r.layout[k].ref_x - s.pupil_x_px, r.layout[k].ref_y - s.pupil_y_px) < 0.5 * 0.3 * 350 - 10)
      centre_in += r.valid_map[k];
  CHECK(centre_in == 0);
}

TEST_CASE("registration lays boxes of the pitch centred on the lattice, inside the frame", "[registration]") {
  const auto s = testing::tilted_bench();
  const auto field = sim::render_lattice_field(s);
  std::mt19937_64 rng(5);
  const auto img = as_float(testing::expose_u16(field, testing::bench_detector(), rng));
  const core::Registration r = run(img, s);
  CHECK(r.grid.pitch_px == 10);
  REQUIRE(static_cast<int>(r.layout.size()) == r.grid.count());
  const core::CameraSpec cam{s.width_px, s.height_px, core::PixelFormat::kU16};
  CHECK(core::validate_layout(r.layout, r.grid, cam).empty());
  for (std::size_t k = 0; k < r.layout.size(); ++k) {
    if (!r.valid_map[k]) continue;
    const auto& b = r.layout[k];
    // The box centre is within half a pixel of the lattice point.
    CHECK(std::abs(b.x0 + 4.5 - b.ref_x) <= 0.5 + 1e-9);
    CHECK(std::abs(b.y0 + 4.5 - b.ref_y) <= 0.5 + 1e-9);
  }
}

TEST_CASE("registration refuses an image without a lattice, with a reason", "[registration]") {
  std::vector<float> flat(100 * 100, 10.0f);
  auto r = core::register_lattice(flat, 100, 100, {});
  REQUIRE(std::holds_alternative<std::string>(r));
  CHECK_THAT(std::get<std::string>(r), Catch::Contains("spots"));
  flat[50 * 100 + 50] = NAN;
  r = core::register_lattice(flat, 100, 100, {});
  CHECK_THAT(std::get<std::string>(r), Catch::Contains("NaN"));
  CHECK_THAT(std::get<std::string>(core::register_lattice(flat, 10, 100, {})), Catch::Contains("width x height"));
  core::RegistrationSettings bad;
  bad.box_px = 1;
  CHECK_THAT(std::get<std::string>(core::register_lattice(flat, 100, 100, bad)), Catch::Contains("box_px"));
}

// Spot-quality metrics and validity flags through the whole pipeline, and
// every centroider on crafted fault windows.
#include <catch2/catch.hpp>

#include <cmath>
#include <cstring>
#include <limits>

#include "daemon/core/pipeline/pipeline.h"
#include "tests/support/window_support.h"

using namespace slopecast;

namespace {

constexpr int kBox = 15;

// An f32 camera that is exactly one 15 px box, so a window is a frame.
core::PipelineSettings one_box(core::CentroiderKind kind) {
  core::PipelineSettings s;
  s.camera = {kBox, kBox, core::PixelFormat::kF32};
  s.grid = {1, 1, kBox, 0, 0};
  s.centroider.kind = kind;
  s.centroider.spot_sigma_px = 1.2;
  s.min_valid_fraction = 0.0;
  return s;
}

core::FrameMeasurement run(const core::PipelineSettings& s, const std::vector<float>& px) {
  REQUIRE(core::validate(s).empty());
  core::Pipeline p(s);
  auto m = p.make_measurement();
  std::vector<std::byte> bytes(px.size() * 4);
  std::memcpy(bytes.data(), px.data(), bytes.size());
  p.measure(core::ImageView{bytes, kBox, kBox, kBox * 4, core::PixelFormat::kF32}, m);
  return m;
}

// A pixel-integrated elliptical Gaussian, axes along x and y (an
// independent erf integration, not the simulator's).
std::vector<float> elliptical(double x0, double y0, double sx, double sy, double photons, double pedestal) {
  std::vector<float> w(kBox * kBox);
  auto g = [](int i, double m, double s) {
    return 0.5 * (std::erf((i + 0.5 - m) / (std::sqrt(2.0) * s)) - std::erf((i - 0.5 - m) / (std::sqrt(2.0) * s)));
  };
  for (int y = 0; y < kBox; ++y)
    for (int x = 0; x < kBox; ++x) w[y * kBox + x] = static_cast<float>(photons * g(x, x0, sx) * g(y, y0, sy) + pedestal);
  return w;
}

bool all_finite(const core::FrameMeasurement& m) {
  for (const auto* v : {&m.slope_x_px, &m.slope_y_px, &m.flux_adu, &m.peak_adu, &m.background_adu, &m.snr,
                        &m.fwhm_x_px, &m.fwhm_y_px, &m.ellipticity, &m.quality})
    for (float f : *v)
      if (!std::isfinite(f)) return false;
  for (float f : {m.slope_rms_x_px, m.slope_rms_y_px, m.mean_flux_adu, m.total_flux_adu, m.median_fwhm_px})
    if (!std::isfinite(f)) return false;
  return true;
}

}  // namespace

TEST_CASE("FWHM of a Gaussian of rms sigma is 2.3548 sigma within 2 % for sigma >= 1 px", "[metrics]") {
  // FWHM = 2 sqrt(2 ln 2) sigma (the Gaussian's half-maximum width, any
  // optics handbook); the pixel's own variance 1/12 px^2 is removed
  // (derived, tests/REFERENCES.md R1.2). Without that correction a 1 px
  // spot reads 4 % wide. The box must hold the spot: at sigma = 2.2 px in
  // a 15 px box (edge at 3.2 sigma, the ring's light subtracted as
  // background) it reads 3.5 % narrow.
  for (double sigma : {1.0, 1.3, 1.7}) {
    for (double dx : {0.0, 0.37, -0.81}) {
      const auto m = run(one_box(core::CentroiderKind::kCog), elliptical(7 + dx, 7 - 0.5 * dx, sigma, sigma, 5e4, 0.0));
      INFO("sigma " << sigma << " dx " << dx << ": fwhm " << m.fwhm_x_px[0] << " x " << m.fwhm_y_px[0]);
      CHECK(m.fwhm_x_px[0] == Approx(2.3548 * sigma).epsilon(0.02));
      CHECK(m.fwhm_y_px[0] == Approx(2.3548 * sigma).epsilon(0.02));
      CHECK(m.ellipticity[0] < 0.02);
      CHECK(m.median_fwhm_px == Approx(2.3548 * sigma).epsilon(0.02));
    }
  }
}

TEST_CASE("ellipticity is 1 - minor/major of the spot's axes", "[metrics]") {
  // Derived from the definition (window_moments.h): axes 2.0 and 1.0 px
  // rms give 0.5; the orientation does not matter (x-long and y-long alike).
  const auto along_x = run(one_box(core::CentroiderKind::kCog), elliptical(7, 7, 2.0, 1.0, 5e4, 0.0));
  const auto along_y = run(one_box(core::CentroiderKind::kCog), elliptical(7, 7, 1.0, 2.0, 5e4, 0.0));
  CHECK(along_x.ellipticity[0] == Approx(0.5).margin(0.01));
  CHECK(along_y.ellipticity[0] == Approx(0.5).margin(0.01));
  CHECK(along_x.fwhm_x_px[0] == Approx(2.3548 * 2.0).epsilon(0.02));
  CHECK(along_x.fwhm_y_px[0] == Approx(2.3548 * 1.0).epsilon(0.02));
  auto s = one_box(core::CentroiderKind::kCog);
  s.max_ellipticity = 0.3;
  CHECK(run(s, elliptical(7, 7, 2.0, 1.0, 5e4, 0.0)).flags[0] == core::kFlagElongated);
  CHECK(run(s, elliptical(7, 7, 1.2, 1.2, 5e4, 0.0)).flags[0] == core::kFlagNone);
}

TEST_CASE("the Gaussian fit reports its fitted widths", "[metrics][gaussian_fit]") {
  const auto m = run(one_box(core::CentroiderKind::kGaussianFit), elliptical(7.3, 6.6, 1.6, 1.1, 5e4, 0.0));
  CHECK(m.flags[0] == core::kFlagNone);
  CHECK(m.fwhm_x_px[0] == Approx(2.3548 * 1.6).epsilon(1e-3));  // its own model: exact to the stopping rule
  CHECK(m.fwhm_y_px[0] == Approx(2.3548 * 1.1).epsilon(1e-3));
  CHECK(m.quality[0] >= 0.0f);
}

TEST_CASE("background, width and edge flags on crafted windows", "[metrics]") {
  auto s = one_box(core::CentroiderKind::kCog);
  SECTION("the border background is the pedestal under the spot") {
    // A 37.5 ADU pedestal: the ring's clipped mean (background.h) reads it
    // up to the spot's tail in the ring (4.7 sigma out: 0.04 ADU in the
    // ring pixels nearest the spot, 0.01 ADU over the ring).
    const auto m = run(s, elliptical(7, 7, 1.5, 1.5, 2e4, 37.5));
    CHECK(m.background_adu[0] == Approx(37.5).margin(0.02));
    CHECK(m.flux_adu[0] == Approx(2e4).epsilon(1e-3));
    CHECK(m.flags[0] == core::kFlagNone);
  }
  SECTION("a spot near the box edge is flagged near_edge") {
    // Centre 0.6 px from the edge (x = -0.5): inside the box, inside the
    // default 1 px margin.
    const auto m = run(s, elliptical(0.1, 7, 0.8, 0.8, 2e4, 0.0));
    CHECK((m.flags[0] & core::kFlagNearEdge) != 0);
    CHECK(m.slope_x_px[0] == 0.0f);
  }
  SECTION("the near-edge check can be turned off") {
    s.edge_margin_px = 0.0;
    s.background = core::BackgroundMode::kNone;
    const auto m = run(s, elliptical(1.0, 7, 0.8, 0.8, 2e4, 0.0));
    CHECK(m.flags[0] == core::kFlagNone);
  }
  SECTION("a wide spot is flagged when max_fwhm_px is set") {
    s.max_fwhm_px = 4.0;
    CHECK(run(s, elliptical(7, 7, 2.0, 2.0, 2e4, 0.0)).flags[0] == core::kFlagWide);  // FWHM 4.7 px
    CHECK(run(s, elliptical(7, 7, 1.5, 1.5, 2e4, 0.0)).flags[0] == core::kFlagNone);  // FWHM 3.5 px
  }
  SECTION("saturation is judged on raw pixels at the configured level") {
    s.saturation_adu = 1000.0;
    const auto m = run(s, elliptical(7, 7, 1.5, 1.5, 2e4, 0.0));  // peak 1400
    CHECK(m.flags[0] == core::kFlagSaturated);
    CHECK(m.n_saturated == 1);
    // Pixels of a 2e4-photon Gaussian of 1.5 px rms at or above 1000: a
    // pixel-wide slice through the centre holds 2 Phi(1/3) - 1 = 0.2611 of
    // the light along an axis, the next one Phi(1) - Phi(1/3) = 0.2107
    // (derived), so the peak pixel has 2e4 * 0.2611^2 = 1363 ADU, the four
    // beside it 1100, the diagonals 888.
    CHECK(m.saturated_pixels[0] == 5u);
    CHECK((m.health & core::kHealthSaturated) != 0);
  }
  SECTION("correlation peak contrast below min_contrast is flagged") {
    // cc: contrast (max - mean)/max of the map, below 1 for any spot (sdf
    // reaches 1 on noiseless data: its minimum is 0).
    s.centroider.kind = core::CentroiderKind::kCorrelation;
    s.centroider.metric = core::CorrelationMetric::kCc;
    s.min_contrast = 0.999;
    const auto m = run(s, elliptical(7, 7, 1.2, 1.2, 2e4, 0.0));
    CHECK(m.quality[0] > 0.1f);
    CHECK(m.quality[0] < 0.999f);
    CHECK(m.flags[0] == core::kFlagLowContrast);
  }
}

TEST_CASE("every method on every fault window returns finite numbers and the right flags", "[metrics][faults]") {
  const float nan = std::numeric_limits<float>::quiet_NaN();
  for (core::CentroiderKind kind : core::kAllCentroiderKinds) {
    auto s = one_box(kind);
    s.min_fwhm_px = 0.5;
    const auto name = std::string(core::centroider_name(kind));
    auto check = [&](const char* fault, const std::vector<float>& px, std::uint32_t must, std::uint32_t any_of,
                     const core::PipelineSettings& settings) {
      const auto m = run(settings, px);
      INFO(name << ", " << fault << ": flags " << m.flags[0]);
      CHECK(all_finite(m));
      CHECK((m.flags[0] & must) == must);
      if (any_of) CHECK((m.flags[0] & any_of) != 0);
      CHECK(m.flags[0] != core::kFlagNone);
      CHECK(m.slope_x_px[0] == 0.0f);
      CHECK(m.slope_y_px[0] == 0.0f);
      CHECK(m.n_valid == 0);
      return m;
    };
    check("all zeros", std::vector<float>(kBox * kBox, 0.0f), core::kFlagLowFlux, 0, s);
    {
      std::vector<float> hot(kBox * kBox, 0.0f);
      hot[9 * kBox + 4] = 5000.0f;
      // Every method that places it sees a zero-width spot; the fit may
      // instead give up on a one-pixel "spot".
      check("single hot pixel", hot, 0, core::kFlagNarrow | core::kFlagMethodFailed, s);
    }
    {
      auto sat = s;
      sat.saturation_adu = 1000.0;
      check("saturated spot", elliptical(7, 7, 1.2, 1.2, 2e4, 0.0), core::kFlagSaturated, 0, sat);
    }
    check("spot half outside the box", elliptical(-0.5, 7, 1.0, 1.0, 2e4, 0.0), 0,
          core::kFlagNearEdge | core::kFlagOutsideBox | core::kFlagMethodFailed, s);
    {
      auto none = s;
      none.background = core::BackgroundMode::kNone;
      check("negative after the dark (border background off)", std::vector<float>(kBox * kBox, -20.0f),
            core::kFlagLowFlux, 0, none);
      check("negative after the dark (border background on)", std::vector<float>(kBox * kBox, -20.0f),
            core::kFlagLowFlux, 0, s);
    }
    {
      auto px = elliptical(7, 7, 1.2, 1.2, 2e4, 0.0);
      px[7 * kBox + 6] = nan;
      const auto m = check("NaN pixel in the spot", px, core::kFlagNonFinite, 0, s);
      CHECK((m.health & core::kHealthNonFinite) != 0);
      CHECK(m.flux_adu[0] == 0.0f);
    }
    {
      auto px = elliptical(7, 7, 1.2, 1.2, 2e4, 0.0);
      px[3] = std::numeric_limits<float>::infinity();
      check("infinite pixel in the ring", px, core::kFlagNonFinite, 0, s);
    }
  }
}

TEST_CASE("a clean spot is valid for every method", "[metrics][faults]") {
  // The counterpart of the faults: the same settings pass a good spot, so
  // the flags above come from the faults, not from the set-up.
  for (core::CentroiderKind kind : core::kAllCentroiderKinds) {
    auto s = one_box(kind);
    s.min_fwhm_px = 0.5;
    const auto m = run(s, elliptical(7.3, 6.8, 1.2, 1.2, 2e4, 10.0));
    INFO(core::centroider_name(kind) << ": flags " << m.flags[0] << " slope " << m.slope_x_px[0] << ", "
                                     << m.slope_y_px[0]);
    CHECK(m.flags[0] == core::kFlagNone);
    CHECK(m.slope_x_px[0] == Approx(0.3).margin(0.05));
    CHECK(m.slope_y_px[0] == Approx(-0.2).margin(0.05));
    CHECK(m.total_flux_adu == Approx(2e4).epsilon(2e-3));
  }
}

TEST_CASE("spot shape: FWHM from the central moments, ellipticity from their eigenvalues, the same on vector lanes",
          "[metrics][simd]") {
  // A Gaussian of rms s sampled on pixels has central moment s^2 + 1/12
  // (the pixel's own variance, removed by spot_shape); FWHM = 2 sqrt(2 ln 2) s
  // (the Gaussian's definition). Ellipticity 1 - sqrt(minor/major) of the
  // covariance's eigenvalues: diag(1, 4) and [[2.5, 1.5], [1.5, 2.5]]
  // (eigenvalues 4 and 1) both give 0.5.
  const double pix = 1.0 / 12.0;
  core::WindowMoments m;
  m.located = true;
  m.var_x = 1.0 + pix;
  m.var_y = 4.0 + pix;
  auto s = core::spot_shape(m);
  CHECK(s.fwhm_x == Approx(2.3548200450309493).epsilon(1e-12));
  CHECK(s.fwhm_y == Approx(2 * 2.3548200450309493).epsilon(1e-12));
  CHECK(s.ellipticity == Approx(0.5).epsilon(1e-12));
  m.var_x = m.var_y = 2.5 + pix;
  m.cov_xy = 1.5;
  CHECK(core::spot_shape(m).ellipticity == Approx(0.5).epsilon(1e-12));
  m.located = false;
  CHECK(core::spot_shape(m).fwhm_x == 0.0);

  // The pipeline evaluates the same formula four windows per vector: each
  // lane must be the scalar value, bit for bit, including the clamps
  // (variance below 1/12) and a zero major axis.
  typedef double D4 __attribute__((vector_size(32)));
  const auto lane_root = [](const D4& v, D4& out) {
    for (int k = 0; k < 4; ++k) out[k] = std::sqrt(v[k]);
  };
  const double cases[][3] = {{1.2, 0.7, 0.1}, {0.05, 0.02, 0.0}, {pix, pix, 0.0}, {3.0, 3.0, -2.9},
                             {0.5, 9.0, 1.0}, {1e-9, 2.0, 0.0}, {7.0, 7.0, 0.0}, {0.0, 0.0, 0.0}};
  for (int first = 0; first < 8; first += 4) {
    D4 vx, vy, c, fx, fy, e;
    for (int k = 0; k < 4; ++k) {
      vx[k] = cases[first + k][0];
      vy[k] = cases[first + k][1];
      c[k] = cases[first + k][2];
    }
    core::spot_shape_of(vx, vy, c, lane_root, fx, fy, e);
    for (int k = 0; k < 4; ++k) {
      core::WindowMoments one;
      one.located = true;
      one.var_x = vx[k];
      one.var_y = vy[k];
      one.cov_xy = c[k];
      const auto want = core::spot_shape(one);
      INFO("case " << first + k);
      CHECK(std::memcmp(&fx[k], &want.fwhm_x, sizeof(double)) == 0);
      CHECK(std::memcmp(&fy[k], &want.fwhm_y, sizeof(double)) == 0);
      CHECK(std::memcmp(&e[k], &want.ellipticity, sizeof(double)) == 0);
    }
  }
}

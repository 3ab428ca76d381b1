// Response curves: measured against true offset on noiseless,
// pixel-integrated Gaussian spots, across each method's linear range. Each
// case states the expected gain (least-squares slope of measured on true
// offset) and the largest error |measured - true| with its source.
#include <catch2/catch.hpp>

#include <cmath>
#include <vector>

#include "daemon/core/centroid/centroid_weighted.h"
#include "daemon/core/centroid/make_centroider.h"
#include "tests/support/window_support.h"

using namespace slopecast;

namespace {

struct Response {
  double gain = 0.0;       // slope of measured on true offset
  double worst_px = 0.0;   // largest |measured - true|
  bool all_located = true;
  bool any_failed = false;
};

// Offsets from -range to +range along x (y held at `y_offset`), side n,
// spot rms sigma, 1e5 photons.
Response response(const core::CentroiderSettings& s, int n, double sigma, double range, double y_offset = 0.0) {
  REQUIRE(core::validate(s, n).empty());
  auto c = core::make_centroider(s, n);
  const double centre = 0.5 * (n - 1);
  std::vector<double> truth, got;
  Response r;
  for (int k = -20; k <= 20; ++k) {
    const double d = range * k / 20.0;
    const auto w = testing::spot_window(n, centre + d, centre + y_offset, sigma, 1e5);
    const core::SpotEstimate e = testing::measure(*c, testing::square(w, n), 1.0f);
    r.all_located &= e.located;
    r.any_failed |= e.failed;
    truth.push_back(d);
    got.push_back(e.x - centre);
    r.worst_px = std::max({r.worst_px, std::abs(e.x - centre - d), std::abs(e.y - centre - y_offset)});
  }
  double st = 0, sg = 0, stt = 0, stg = 0;
  const double m = static_cast<double>(truth.size());
  for (std::size_t i = 0; i < truth.size(); ++i) {
    st += truth[i];
    sg += got[i];
    stt += truth[i] * truth[i];
    stg += truth[i] * got[i];
  }
  r.gain = (m * stg - st * sg) / (m * stt - st * st);
  return r;
}

core::CentroiderSettings method(core::CentroiderKind k) {
  core::CentroiderSettings s;
  s.kind = k;
  return s;
}

}  // namespace

TEST_CASE("CoG response: unit gain, error below 1e-3 px over +-3 px", "[centroid][response]") {
  // Derived (centroid_cog_test): pixel sampling bias ~exp(-2 pi^2 sigma^2),
  // truncation < 1e-4 px with the spot 4 sigma inside a 15 px box.
  const Response r = response(method(core::CentroiderKind::kCog), 15, 1.0, 3.0);
  INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
  CHECK(r.all_located);
  CHECK(r.gain == Approx(1.0).margin(1e-4));
  CHECK(r.worst_px < 1e-3);
}

TEST_CASE("thresholded CoG response: unit gain with a sampling ripple", "[centroid][response][tcog]") {
  // Derived: subtracting T from the pixels above it leaves a symmetric
  // profile for a symmetric spot, so the continuum estimate is unbiased
  // (Thomas et al. 2006). On pixels the set above T changes as the spot
  // moves, which leaves a ripple of period 1 px; its size grows with T and
  // shrinks with sigma. Bounds: measured values rounded up by ~50 %.
  auto s = method(core::CentroiderKind::kThresholded);
  SECTION("relative, 20 % of the peak, sigma 1.5 px") {
    s.threshold = 0.2;
    const Response r = response(s, 15, 1.5, 3.0);
    INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
    CHECK(r.all_located);
    CHECK(r.gain == Approx(1.0).margin(0.01));
    CHECK(r.worst_px < 0.03);  // measured 0.021 px
  }
  SECTION("absolute, 500 ADU of a 7000 ADU peak, sigma 1.5 px") {
    s.threshold_mode = core::ThresholdMode::kAbsolute;
    s.threshold = 500.0;
    const Response r = response(s, 15, 1.5, 3.0);
    INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
    CHECK(r.all_located);
    CHECK(r.gain == Approx(1.0).margin(0.01));
    CHECK(r.worst_px < 0.01);
  }
}

TEST_CASE("weighted CoG response: the (sigma_s^2 + 1/12 + sigma_w^2)/sigma_w^2 correction gives unit gain", "[centroid][response][wcog]") {
  // Nicolle et al. 2004 / Thomas et al. 2006: a Gaussian weight of rms
  // sigma_w on a Gaussian spot of rms sigma_s has gain
  // sigma_w^2/(sigma_s^2 + sigma_w^2), exactly linear in the continuum;
  // +1/12 for pixel integration (derived; tests/REFERENCES.md R6.1).
  auto s = method(core::CentroiderKind::kWeighted);
  s.spot_sigma_px = 1.5;
  s.weight_sigma_px = 2.0;
  SECTION("weight fixed at the box centre: linear to 1 % over +-1.5 px") {
    const Response r = response(s, 15, 1.5, 1.5);
    INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
    CHECK(r.all_located);
    CHECK(r.gain == Approx(1.0).margin(0.01));
    // Sampling and window truncation only (derived: the weighted profile
    // has rms 1.2 px, 5 rms inside the box at 1.5 px offset).
    CHECK(r.worst_px < 0.015);
  }
  SECTION("the gain correction includes the pixel's 1/12 px^2") {
    core::WeightedCentroider w(s, 15);
    CHECK(w.gain() == Approx((1.5 * 1.5 + 1.0 / 12 + 4.0) / 4.0).epsilon(1e-12));
  }
  SECTION("a wrong spot width is a gain error of the stated size") {
    s.spot_sigma_px = 1.2;  // the spot is 1.5
    const Response r = response(s, 15, 1.5, 1.0);
    const double expected = (1.2 * 1.2 + 1.0 / 12 + 4.0) / (1.5 * 1.5 + 1.0 / 12 + 4.0);
    INFO("gain " << r.gain << ", expected " << expected);
    CHECK(r.gain == Approx(expected).margin(0.01));
  }
  SECTION("weight following the spot: linear over +-4 px, converged") {
    s.weight_follows_spot = true;
    const Response r = response(s, 15, 1.5, 4.0);
    INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
    CHECK(r.all_located);
    CHECK_FALSE(r.any_failed);
    CHECK(r.gain == Approx(1.0).margin(0.01));
    CHECK(r.worst_px < 0.02);
  }
}

TEST_CASE("brightest-pixels CoG response", "[centroid][response][brightest]") {
  // Derived like the thresholded CoG (a threshold that keeps N pixels):
  // unbiased in the continuum, a sampling ripple on pixels that is largest
  // when few pixels are kept. Bounds: measured values rounded up.
  auto s = method(core::CentroiderKind::kBrightest);
  s.brightest_pixels = 30;
  const Response r = response(s, 15, 1.5, 3.0);
  INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
  CHECK(r.all_located);
  CHECK(r.gain == Approx(1.0).margin(0.005));  // measured 0.99986
  CHECK(r.worst_px < 0.01);                     // measured 0.0055 px
}

TEST_CASE("quad-cell response: the erf inverse gives pixels over +-1 sigma", "[centroid][response][quad_cell]") {
  // s = erf(dx/(sqrt 2 sigma)) for halves much larger than the spot
  // (derived, tests/REFERENCES.md R6.3): with the right sigma the inverse is
  // exact up to the light beyond the box (5 sigma here: < 1e-6 of it).
  auto s = method(core::CentroiderKind::kQuadCell);
  s.spot_sigma_px = 1.5;
  SECTION("16 px box binned to 2 x 2") {
    const Response r = response(s, 16, 1.5, 1.5);
    INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
    CHECK(r.gain == Approx(1.0).margin(1e-3));
    CHECK(r.worst_px < 1e-3);
  }
  SECTION("odd 15 px box: the middle column is split by a local quadratic") {
    // The split is exact where the light is quadratic across three pixels
    // (derived in centroid_quad_cell.cpp); a Gaussian of 1.5 px is not
    // quite, so a small error remains (half and half instead: gain 0.95,
    // 0.08 px).
    const Response r = response(s, 15, 1.5, 1.5);
    INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
    CHECK(r.gain == Approx(1.0).margin(0.015));  // measured 0.9905
    CHECK(r.worst_px < 0.02);                     // measured 0.012 px
  }
}

TEST_CASE("correlation response: SDF with 2-D quadratic interpolation against a matched Gaussian reference", "[centroid][response][correlation]") {
  // Löfdahl 2010: interpolating the correlation map's extremum biases the
  // estimate toward whole pixels ("peak locking"); the size depends on the
  // spot and the interpolator. Bounds: measured, rounded up.
  auto s = method(core::CentroiderKind::kCorrelation);
  s.spot_sigma_px = 1.5;
  s.search_px = 3;
  // The integer extremum must stay inside the search range: +-2 px of +-3.
  const Response r = response(s, 15, 1.5, 2.0);
  INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
  CHECK(r.all_located);
  CHECK_FALSE(r.any_failed);
  CHECK(r.gain == Approx(1.0).margin(0.005));  // measured 1.0011
  CHECK(r.worst_px < 0.02);                     // measured 0.0106 px
}

TEST_CASE("Gaussian fit response: exact on its own model", "[centroid][response][gaussian_fit]") {
  // The model is the pixel-integrated Gaussian the spot was drawn from, so
  // the least-squares minimum is the truth; the tolerance is the stopping
  // rule (1e-4 px) plus float pixels.
  auto s = method(core::CentroiderKind::kGaussianFit);
  s.spot_sigma_px = 1.2;  // a start away from the truth
  const Response r = response(s, 15, 1.5, 3.0);
  INFO("gain " << r.gain << ", worst " << r.worst_px << " px");
  CHECK(r.all_located);
  CHECK_FALSE(r.any_failed);
  CHECK(r.gain == Approx(1.0).margin(1e-4));
  CHECK(r.worst_px < 1e-3);
}

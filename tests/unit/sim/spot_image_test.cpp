// The simulator's spots: pixel integrals of a Gaussian, and the spot field.
#include <catch2/catch.hpp>

#include <cmath>

#include "client/sim/spot_field.h"
#include "client/sim/spot_image.h"

using namespace slopecast;

TEST_CASE("interval fractions are erf differences of the normal CDF", "[sim][spot]") {
  // Handbook values of the standard normal distribution (Abramowitz & Stegun,
  // ch. 26 tables; section number from memory): P(|Z| < 1) = 0.682689492,
  // P(|Z| < 2) = 0.954499736.
  CHECK(sim::gaussian_interval_fraction(-1, 1, 0, 1) == Approx(0.682689492).margin(1e-9));
  CHECK(sim::gaussian_interval_fraction(-4, 4, 0, 2) == Approx(0.954499736).margin(1e-9));
  CHECK(sim::gaussian_interval_fraction(3, 4, 3, 0.5) == Approx(0.5 * 0.954499736).margin(1e-9));
}

TEST_CASE("each pixel holds the integral of the spot over the pixel's area", "[sim][spot]") {
  // Independent check: midpoint-rule integration of the 2-D Gaussian density
  // on a 200 x 200 sub-grid of every pixel. The midpoint rule's error is
  // h^2/24 * f''/f per axis, h = 1/200: ~1e-5 relative for sigma = 0.9 px
  // two pixels from the centre, so 1e-4 is the tolerance.
  const int n = 9;
  const double x0 = 4.3, y0 = 3.85, sigma = 0.9, photons = 1000.0;
  std::vector<double> img(n * n, 0.0);
  sim::add_gaussian_spot(img, n, x0, y0, sigma, photons, sim::ClipRect{0, 0, n, n});
  const int sub = 200;
  for (int y = 2; y <= 6; y += 2)
    for (int x = 2; x <= 6; ++x) {
      double integral = 0.0;
      for (int j = 0; j < sub; ++j)
        for (int i = 0; i < sub; ++i) {
          const double px = x - 0.5 + (i + 0.5) / sub, py = y - 0.5 + (j + 0.5) / sub;
          integral += std::exp(-((px - x0) * (px - x0) + (py - y0) * (py - y0)) / (2 * sigma * sigma));
        }
      integral *= photons / (2 * M_PI * sigma * sigma) / (sub * sub);
      CHECK(img[y * n + x] == Approx(integral).epsilon(1e-4));
    }
}

TEST_CASE("a spot is clipped to its own box", "[sim][spot]") {
  std::vector<double> img(20 * 10, 0.0);
  sim::add_gaussian_spot(img, 20, 9.6, 5.0, 1.0, 100.0, sim::ClipRect{0, 0, 10, 10});
  for (int y = 0; y < 10; ++y)
    for (int x = 10; x < 20; ++x) CHECK(img[y * 20 + x] == 0.0);
  // Columns 0..9 hold P(X < 9.5) of the spot: Phi(-0.1) = 0.46017 (normal
  // distribution table, A&S ch. 26).
  double sum = 0.0;
  for (double v : img) sum += v;
  CHECK(sum == Approx(100.0 * 0.460172).epsilon(1e-4));
}

TEST_CASE("the spot field puts each spot at its box centre plus its offset", "[sim][spot]") {
  sim::SpotFieldSettings s;
  s.grid = {3, 2, 10, 0, 0};
  s.spot_sigma_px = 1.0;
  s.photons_per_spot = 500;
  std::mt19937_64 rng(3);
  const sim::SpotOffsets o = sim::draw_offsets(s, rng);
  REQUIRE(o.dx_px.size() == 6);
  for (double d : o.dx_px) CHECK(std::abs(d) <= s.max_offset_px);
  const auto img = sim::render_spot_field(s, o, 30, 20);
  // First moment of box 4 (ix 1, iy 1) = zero point + offset.
  double sum = 0, sx = 0;
  for (int y = 10; y < 20; ++y)
    for (int x = 10; x < 20; ++x) {
      sum += img[y * 30 + x];
      sx += x * img[y * 30 + x];
    }
  CHECK(sx / sum == Approx(14.5 + o.dx_px[4]).margin(2e-3));
}

TEST_CASE("spot field settings are validated", "[sim][spot]") {
  sim::SpotFieldSettings s;
  s.grid = {2, 2, 8, 0, 0};
  CHECK(sim::validate(s).empty());
  s.max_offset_px = 5;
  CHECK_THAT(sim::validate(s), Catch::Contains("outside"));
  s.max_offset_px = 1;
  s.spot_sigma_px = 0;
  CHECK_THAT(sim::validate(s), Catch::Contains("sigma"));
}

// Centre of gravity on noiseless, pixel-integrated Gaussian spots.
#include <catch2/catch.hpp>

#include <opencv2/imgproc.hpp>

#include "client/sim/spot_image.h"
#include "daemon/core/centroid/centroid_cog.h"

using namespace slopecast;

namespace {

// A window of side n with a pixel-integrated Gaussian (each pixel the
// integral over its area, via erf) of rms sigma centred at (x0, y0).
std::vector<float> spot_window(int n, double x0, double y0, double sigma, double photons) {
  std::vector<double> img(static_cast<std::size_t>(n) * n, 0.0);
  sim::add_gaussian_spot(img, n, x0, y0, sigma, photons, sim::ClipRect{0, 0, n, n});
  return {img.begin(), img.end()};
}

}  // namespace

TEST_CASE("centroid of a noiseless pixel-integrated Gaussian is its centre to 1e-3 px", "[centroid][cog]") {
  // Derived: for a Gaussian wider than about a pixel, the CoG of
  // pixel-integrated samples is unbiased up to a periodic term of order
  // exp(-2 pi^2 sigma^2) (Poisson summation; 2.7e-9 px at sigma = 1), and
  // truncation (window edge >= 4.3 sigma from the spot here) shifts it by
  // < 1e-4 px. So 1e-3 px is a loose bound that any real bias would break.
  const int n = 15;
  const double centre = 7.0;
  core::CogCentroider cog(64);
  double worst = 0.0;
  for (double sigma : {1.0, 1.5}) {
    for (double dx : {-1.0, -0.37, -0.125, 0.0, 0.25, 0.5, 0.83}) {
      for (double dy : {-0.9, -0.5, 0.0, 0.1, 0.61}) {
        const auto w = spot_window(n, centre + dx, centre + dy, sigma, 1e4);
        const core::SpotEstimate e = cog.measure({w.data(), n, n, n});
        REQUIRE(e.located);
        worst = std::max({worst, std::abs(e.x - (centre + dx)), std::abs(e.y - (centre + dy))});
        CHECK(e.flux == Approx(1e4).epsilon(1e-4));  // nearly all of the spot lies in the window
      }
    }
  }
  INFO("largest CoG error " << worst << " px");
  CHECK(worst < 1e-3);
}

TEST_CASE("CoG agrees with OpenCV cv::moments on the same windows", "[centroid][cog]") {
  // Reference: OpenCV's image moments, x = m10/m00, y = m01/m00, with pixel
  // (x, y) at integer coordinates, the same convention as ours. Both sum the
  // same float pixels, so only rounding differs (float accumulation: 1e-5 px).
  core::CogCentroider cog(64);
  for (double x0 : {3.2, 6.9, 10.45}) {
    for (double y0 : {2.8, 7.0, 11.3}) {
      const int n = 15;
      auto w = spot_window(n, x0, y0, 1.3, 5000);
      w[17] += 40.0f;  // a hot pixel, so the check is not only about symmetric spots
      const cv::Mat mat(n, n, CV_32F, w.data());
      const cv::Moments m = cv::moments(mat, false);
      const core::SpotEstimate e = cog.measure({w.data(), n, n, n});
      CHECK(e.x == Approx(m.m10 / m.m00).margin(1e-5));
      CHECK(e.y == Approx(m.m01 / m.m00).margin(1e-5));
      CHECK(e.flux == Approx(m.m00).epsilon(1e-6));
    }
  }
}

TEST_CASE("CoG of a non-square window uses x for columns and y for rows", "[centroid][cog]") {
  // A single lit pixel at column 5, row 2 of a 9 x 4 window.
  std::vector<float> w(36, 0.0f);
  w[2 * 9 + 5] = 10.0f;
  const core::SpotEstimate e = core::CogCentroider(64).measure({w.data(), 9, 4, 9});
  REQUIRE(e.located);
  CHECK(e.x == 5.0);
  CHECK(e.y == 2.0);
  CHECK(e.peak == 10.0);
}

TEST_CASE("CoG refuses to place a spot without positive flux", "[centroid][cog]") {
  std::vector<float> w(25, 0.0f);
  core::CogCentroider cog(64);
  SECTION("empty window") {
    const auto e = cog.measure({w.data(), 5, 5, 5});
    CHECK_FALSE(e.located);
    CHECK(e.x == 0.0);
    CHECK(e.y == 0.0);
  }
  SECTION("net negative window (over-subtracted dark)") {
    for (auto& v : w) v = -1.0f;
    w[12] = 3.0f;
    const auto e = cog.measure({w.data(), 5, 5, 5});
    CHECK_FALSE(e.located);
    CHECK(e.flux == Approx(-21.0));
  }
  SECTION("NaN pixel") {
    w[3] = std::numeric_limits<float>::quiet_NaN();
    w[12] = 10.0f;
    CHECK_FALSE(cog.measure({w.data(), 5, 5, 5}).located);
  }
}

TEST_CASE("CoG over a strip equals CoG window by window", "[centroid][cog]") {
  // Three 12 px windows side by side in a strip whose rows are padded to 40
  // floats: the strip sweep and the per-window path must agree exactly
  // (same float column sums, same double reduction).
  const int pitch = 12, n = 3, stride = 40;
  std::vector<float> strip(static_cast<std::size_t>(stride) * pitch, -99.0f);  // padding poison
  for (int k = 0; k < n; ++k) {
    const auto w = spot_window(pitch, 5.5 + 0.3 * k, 5.5 - 0.4 * k, 1.2, 3000.0 * (k + 1));
    for (int y = 0; y < pitch; ++y)
      for (int x = 0; x < pitch; ++x) strip[y * stride + k * pitch + x] = w[y * pitch + x];
  }
  const core::StripView view{strip.data(), pitch, pitch, n, stride};
  core::CogCentroider cog(n * pitch);
  std::vector<core::SpotEstimate> swept(n);
  cog.measure_strip(view, swept);
  for (int k = 0; k < n; ++k) {
    const core::SpotEstimate one = cog.measure(view.window(k));
    CHECK(swept[k].x == one.x);
    CHECK(swept[k].y == one.y);
    CHECK(swept[k].flux == one.flux);
    CHECK(swept[k].x == Approx(5.5 + 0.3 * k).margin(1e-3));
    CHECK(swept[k].y == Approx(5.5 - 0.4 * k).margin(1e-3));
  }
}

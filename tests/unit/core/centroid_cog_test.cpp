// Centre of gravity and the window moments behind it, on noiseless,
// pixel-integrated Gaussian spots.
#include <catch2/catch.hpp>

#include <opencv2/imgproc.hpp>

#include "daemon/core/centroid/centroid_cog.h"
#include "tests/support/window_support.h"

using namespace slopecast;
using testing::measure;
using testing::spot_window;
using testing::square;

TEST_CASE("centroid of a noiseless pixel-integrated Gaussian is its centre to 1e-3 px", "[centroid][cog]") {
  // Derived: for a Gaussian wider than about a pixel, the CoG of
  // pixel-integrated samples is unbiased up to a periodic term of order
  // exp(-2 pi^2 sigma^2) (Poisson summation; 2.7e-9 px at sigma = 1), and
  // truncation (window edge >= 4.3 sigma from the spot here) shifts it by
  // < 1e-4 px. So 1e-3 px is a loose bound that any real bias would break.
  const int n = 15;
  const double centre = 7.0;
  core::CogCentroider cog;
  double worst = 0.0;
  for (double sigma : {1.0, 1.5}) {
    for (double dx : {-1.0, -0.37, -0.125, 0.0, 0.25, 0.5, 0.83}) {
      for (double dy : {-0.9, -0.5, 0.0, 0.1, 0.61}) {
        const auto w = spot_window(n, centre + dx, centre + dy, sigma, 1e4);
        const auto c = testing::context_of(square(w, n));
        const core::SpotEstimate e = cog.measure(square(w, n), c);
        REQUIRE(e.located);
        worst = std::max({worst, std::abs(e.x - (centre + dx)), std::abs(e.y - (centre + dy))});
        CHECK(c.moments.flux == Approx(1e4).epsilon(1e-4));  // nearly all of the spot lies in the window
      }
    }
  }
  INFO("largest CoG error " << worst << " px");
  CHECK(worst < 1e-3);
}

TEST_CASE("window moments agree with OpenCV cv::moments on the same windows", "[centroid][cog][moments]") {
  // Reference: OpenCV's image moments, x = m10/m00, y = m01/m00 and the
  // central moments mu20, mu02, mu11, with pixel (x, y) at integer
  // coordinates, the same convention as ours. Both sum the same float
  // pixels, so only rounding differs (float accumulation: 1e-5 px, 1e-4 px^2).
  for (double x0 : {3.2, 6.9, 10.45}) {
    for (double y0 : {2.8, 7.0, 11.3}) {
      const int n = 15;
      auto w = spot_window(n, x0, y0, 1.3, 5000);
      w[17] += 40.0f;  // a hot pixel, so the check is not only about symmetric spots
      const cv::Mat mat(n, n, CV_32F, w.data());
      const cv::Moments m = cv::moments(mat, false);
      const auto c = testing::context_of(square(w, n));
      const core::SpotEstimate e = core::CogCentroider().measure(square(w, n), c);
      CHECK(e.x == Approx(m.m10 / m.m00).margin(1e-5));
      CHECK(e.y == Approx(m.m01 / m.m00).margin(1e-5));
      CHECK(c.moments.flux == Approx(m.m00).epsilon(1e-6));
      CHECK(c.moments.var_x == Approx(m.mu20 / m.m00).margin(1e-4));
      CHECK(c.moments.var_y == Approx(m.mu02 / m.m00).margin(1e-4));
      CHECK(c.moments.cov_xy == Approx(m.mu11 / m.m00).margin(1e-4));
    }
  }
}

TEST_CASE("CoG of a non-square window uses x for columns and y for rows", "[centroid][cog]") {
  // A single lit pixel at column 5, row 2 of a 9 x 4 window.
  std::vector<float> w(36, 0.0f);
  w[2 * 9 + 5] = 10.0f;
  const core::WindowView v{w.data(), 9, 4, 9};
  const auto c = testing::context_of(v);
  const core::SpotEstimate e = core::CogCentroider().measure(v, c);
  REQUIRE(e.located);
  CHECK(e.x == 5.0);
  CHECK(e.y == 2.0);
  CHECK(c.moments.peak == 10.0);
}

TEST_CASE("CoG refuses to place a spot without positive flux", "[centroid][cog]") {
  std::vector<float> w(25, 0.0f);
  core::CogCentroider cog;
  SECTION("empty window") {
    const auto e = measure(cog, square(w, 5));
    CHECK_FALSE(e.located);
    CHECK(e.x == 0.0);
    CHECK(e.y == 0.0);
  }
  SECTION("net negative window (over-subtracted dark)") {
    for (auto& v : w) v = -1.0f;
    w[12] = 3.0f;
    CHECK_FALSE(measure(cog, square(w, 5)).located);
    CHECK(testing::context_of(square(w, 5)).moments.flux == Approx(-21.0));
  }
  SECTION("NaN pixel") {
    w[3] = std::numeric_limits<float>::quiet_NaN();
    w[12] = 10.0f;
    CHECK_FALSE(measure(cog, square(w, 5)).located);
  }
}

TEST_CASE("moments over a strip equal moments window by window", "[centroid][cog][moments]") {
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
  core::MomentAccumulator acc(n * pitch);
  std::vector<core::WindowMoments> swept(n);
  acc.strip(view, swept);
  for (int k = 0; k < n; ++k) {
    const core::WindowMoments one = acc.window(view.window(k));
    CHECK(swept[k].cx == one.cx);
    CHECK(swept[k].cy == one.cy);
    CHECK(swept[k].flux == one.flux);
    CHECK(swept[k].var_x == one.var_x);
    CHECK(swept[k].cov_xy == one.cov_xy);
    CHECK(swept[k].cx == Approx(5.5 + 0.3 * k).margin(1e-3));
    CHECK(swept[k].cy == Approx(5.5 - 0.4 * k).margin(1e-3));
  }
}

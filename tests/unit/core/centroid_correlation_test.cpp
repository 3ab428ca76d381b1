// Correlation centroider: integer extremum against OpenCV's matchTemplate,
// sub-pixel interpolators against Löfdahl 2010 (tests/REFERENCES.md R7), and
// an extended scene shifted by a known sub-pixel amount.
#include <catch2/catch.hpp>

#include <cmath>
#include <random>

#include <opencv2/core.hpp>
#include <opencv2/imgproc.hpp>

#include "daemon/core/centroid/centroid_correlation.h"
#include "daemon/core/centroid/peak_interpolation.h"
#include "tests/support/window_support.h"

using namespace slopecast;

namespace {

core::CentroiderSettings correlation(core::CorrelationMetric m, int search_px) {
  core::CentroiderSettings s;
  s.kind = core::CentroiderKind::kCorrelation;
  s.metric = m;
  s.search_px = search_px;
  s.spot_sigma_px = 1.4;
  return s;
}

// A window with two spots (so the map has structure beyond one peak) and
// noise, different for each seed.
std::vector<float> busy_window(int n, std::uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> pos(0.5 * (n - 1) - 2.5, 0.5 * (n - 1) + 2.5);
  std::normal_distribution<double> noise(0.0, 20.0);
  std::vector<double> img(static_cast<std::size_t>(n) * n, 0.0);
  sim::add_gaussian_spot(img, n, pos(rng), pos(rng), 1.4, 2e4, sim::ClipRect{0, 0, n, n});
  sim::add_gaussian_spot(img, n, pos(rng), pos(rng), 1.0, 5e3, sim::ClipRect{0, 0, n, n});
  std::vector<float> w(img.size());
  for (std::size_t i = 0; i < img.size(); ++i) w[i] = static_cast<float>(img[i] + noise(rng));
  return w;
}

}  // namespace

TEST_CASE("the correlation maps and integer extremum agree with OpenCV cv::matchTemplate", "[centroid][correlation]") {
  // Reference library: OpenCV matchTemplate with the window as image and the
  // template as templ (OpenCV documentation, imgproc "Object Detection").
  // cc is TM_CCORR directly. sdf with the per-shift brightness k = A/S
  // (A = sum I over the overlap, S = sum T) expands to
  //   sum (I - k T)^2 = B - 2 k C + k^2 S2,
  // with B = TM_CCORR of I^2 with ones, A = TM_CCORR of I with ones,
  // C = TM_CCORR of I with T, S2 = sum T^2 -- and with k = 1 it is exactly
  // TM_SQDIFF, checked too so that the expansion is tied to OpenCV's own SDF.
  // Float sums of ~81 terms: maps agree to 1e-3 relative; the extremum cell
  // is the same.
  const int n = 15, s = 3, m = 2 * s + 1;
  for (std::uint64_t seed = 1; seed <= 20; ++seed) {
    const auto w = busy_window(n, seed);
    const cv::Mat image(n, n, CV_32F, const_cast<float*>(w.data()));
    for (auto metric : {core::CorrelationMetric::kCc, core::CorrelationMetric::kSdf}) {
      core::CorrelationCentroider c(correlation(metric, s), n);
      const core::SpotEstimate e = testing::measure(c, testing::square(w, n));
      const int t = c.template_side();
      std::vector<float> tp(c.template_pixels());
      const cv::Mat templ(t, t, CV_32F, tp.data());
      cv::Mat ccorr, ones_a, sq_b, sqdiff;
      cv::matchTemplate(image, templ, ccorr, cv::TM_CCORR);
      cv::Mat ones = cv::Mat::ones(t, t, CV_32F);
      cv::matchTemplate(image, ones, ones_a, cv::TM_CCORR);
      cv::matchTemplate(image.mul(image), ones, sq_b, cv::TM_CCORR);
      cv::matchTemplate(image, templ, sqdiff, cv::TM_SQDIFF);
      const double S = cv::sum(templ)[0], S2 = templ.dot(templ);
      cv::Mat expected(m, m, CV_64F);
      for (int v = 0; v < m; ++v)
        for (int u = 0; u < m; ++u) {
          const double C = ccorr.at<float>(v, u);
          if (metric == core::CorrelationMetric::kCc) {
            expected.at<double>(v, u) = C;
          } else {
            const double k = ones_a.at<float>(v, u) / S, B = sq_b.at<float>(v, u);
            expected.at<double>(v, u) = B - 2 * k * C + k * k * S2;
            // The same expansion at k = 1 is OpenCV's TM_SQDIFF.
            CHECK(B - 2 * C + S2 == Approx(sqdiff.at<float>(v, u)).epsilon(1e-3));
          }
        }
      cv::Point lo, hi;
      cv::minMaxLoc(expected, nullptr, nullptr, &lo, &hi);
      const cv::Point best_cv = metric == core::CorrelationMetric::kCc ? hi : lo;
      const auto& map = c.map();
      std::size_t best = 0;
      for (std::size_t i = 0; i < map.size(); ++i) {
        CHECK(map[i] == Approx(expected.at<double>(static_cast<int>(i) / m, static_cast<int>(i) % m))
                            .epsilon(1e-3)
                            .margin(1e-3 * std::abs(expected.at<double>(best_cv))));
        if (metric == core::CorrelationMetric::kSdf ? map[i] < map[best] : map[i] > map[best]) best = i;
      }
      INFO("seed " << seed << (metric == core::CorrelationMetric::kCc ? " cc" : " sdf"));
      CHECK(static_cast<int>(best % m) == best_cv.x);
      CHECK(static_cast<int>(best / m) == best_cv.y);
      REQUIRE(e.located);
      CHECK(std::abs(e.x - (0.5 * (n - 1) + best_cv.x - s)) <= 1.0);
      CHECK(std::abs(e.y - (0.5 * (n - 1) + best_cv.y - s)) <= 1.0);
    }
  }
}

TEST_CASE("interpolators reproduce Löfdahl's check values on a Gaussian peak", "[centroid][correlation][interpolation]") {
  // tests/REFERENCES.md R7.4: samples of a Gaussian peak of rms 1.2 px
  // centred at +0.300 px: the 1-D parabola (1QI) reads 0.2667 (peak
  // locking), the 3-point Gaussian reads 0.3000 (exact for a Gaussian).
  auto g = [](double x) { return std::exp(-0.5 * (x - 0.3) * (x - 0.3) / (1.2 * 1.2)); };
  CHECK(core::parabola_offset(g(-1), g(0), g(1)) == Approx(0.2667).margin(5e-5));
  CHECK(core::gaussian_offset(g(-1), g(0), g(1)) == Approx(0.3000).margin(1e-12));
  // The 1QI formula on an exact parabola is exact (Löfdahl 2010, Table 2).
  auto q = [](double x) { return 5.0 - 2.0 * (x + 0.41) * (x + 0.41); };
  CHECK(core::parabola_offset(q(-1), q(0), q(1)) == Approx(-0.41).margin(1e-12));
  // Degenerate samples give NaN, never a number that looks fine.
  CHECK(std::isnan(core::parabola_offset(1.0, 1.0, 1.0)));
  CHECK(std::isnan(core::gaussian_offset(-1.0, 2.0, 1.0)));
}

TEST_CASE("the 2-D quadratic least-squares fit recovers the extremum of an exact quadratic surface", "[centroid][correlation][interpolation]") {
  // R7.3/R7.4 (derived from the normal equations; Löfdahl 2010 Table 2): a
  // quadratic with a cross term sampled on 3 x 3 is fitted exactly, so the
  // extremum comes back to rounding.
  for (auto [x0, y0] : {std::pair{0.27, -0.33}, std::pair{-0.45, 0.12}, std::pair{0.0, 0.49}}) {
    auto f = [&](double x, double y) {
      const double dx = x - x0, dy = y - y0;
      return 7.0 + 1.3 * dx * dx + 0.9 * dy * dy + 0.4 * dx * dy;  // a minimum at (x0, y0)
    };
    double s[3][3];
    for (int j = 0; j < 3; ++j)
      for (int i = 0; i < 3; ++i) s[j][i] = f(i - 1, j - 1);
    const core::PeakOffset o = core::quadratic_ls_offset(s);
    CHECK(o.dx == Approx(x0).margin(1e-12));
    CHECK(o.dy == Approx(y0).margin(1e-12));
  }
}

TEST_CASE("SDF with 2-D quadratic interpolation recovers a Fourier-shifted extended scene within 0.05 px", "[centroid][correlation][extended]") {
  // An extended scene (the solar-granulation or diffuser case): a smooth
  // random texture, the reference, and the same texture shifted by a known
  // sub-pixel amount with the Fourier shift theorem (multiply the spectrum
  // by exp(-2 pi i (u dx + v dy)); OpenCV's cv::dft as the reference FFT).
  // The texture is periodic over the 64 px tile, so the shift is exact; a
  // 20 px box cut from the middle sees no wrap-around. The remaining error
  // is the quadratic interpolation's bias on an SDF that is not quite
  // quadratic over +-1 px, which depends on the scene's spectrum and the
  // template size (Löfdahl 2010 studies it): measured on this texture
  // (1.5 px rms smoothing) 0.026 px with a 20 px box, 0.07 px with 16 px;
  // 0.015 px with a 24 px box and 2 px smoothing.
  const int big = 64, n = 20;
  std::mt19937_64 rng(5);
  std::normal_distribution<float> white(0.0f, 1.0f);
  cv::Mat tex(big, big, CV_32F);
  for (int y = 0; y < big; ++y)
    for (int x = 0; x < big; ++x) tex.at<float>(y, x) = white(rng);
  // Smooth with a periodic Gaussian filter in the Fourier domain (1.5 px rms).
  cv::Mat spec;
  cv::dft(tex, spec, cv::DFT_COMPLEX_OUTPUT);
  auto freq = [&](int k) { return (k <= big / 2 ? k : k - big) / static_cast<double>(big); };
  auto shifted = [&](double dx, double dy) {
    cv::Mat s = spec.clone();
    for (int v = 0; v < big; ++v)
      for (int u = 0; u < big; ++u) {
        const double fu = freq(u), fv = freq(v);
        const double smooth = std::exp(-2.0 * M_PI * M_PI * 2.25 * (fu * fu + fv * fv));
        const double phase = -2.0 * M_PI * (fu * dx + fv * dy);
        cv::Vec2f& c = s.at<cv::Vec2f>(v, u);
        const std::complex<double> z = std::complex<double>(c[0], c[1]) * std::polar(smooth, phase);
        c = cv::Vec2f(static_cast<float>(z.real()), static_cast<float>(z.imag()));
      }
    cv::Mat out;
    cv::dft(s, out, cv::DFT_INVERSE | cv::DFT_REAL_OUTPUT | cv::DFT_SCALE);
    // A positive scene with contrast: 1000 + 300 x texture / its rms.
    cv::Scalar mean, sd;
    cv::meanStdDev(out, mean, sd);
    std::vector<float> box(static_cast<std::size_t>(n) * n);
    for (int y = 0; y < n; ++y)
      for (int x = 0; x < n; ++x)
        box[static_cast<std::size_t>(y) * n + x] =
            static_cast<float>(1000.0 + 300.0 * (out.at<float>(24 + y, 24 + x) - mean[0]) / sd[0]);
    return box;
  };
  auto s = correlation(core::CorrelationMetric::kSdf, 3);
  s.interpolation = core::PeakInterpolation::kQuadraticLs;
  s.reference = core::ReferenceSource::kFile;
  s.reference_image = shifted(0.0, 0.0);
  s.reference_size = n;
  REQUIRE(core::validate(s, n).empty());
  core::CorrelationCentroider c(s, n);
  double worst = 0.0;
  for (auto [dx, dy] : {std::pair{2.0, -2.0}, std::pair{0.3, -0.2}, std::pair{-1.45, 0.7}, std::pair{0.5, 0.5}, std::pair{2.1, -1.8},
                        std::pair{-0.05, 0.15}}) {
    const auto live = shifted(dx, dy);
    const core::SpotEstimate e = testing::measure(c, testing::square(live, n));
    REQUIRE(e.located);
    CHECK_FALSE(e.failed);
    const double centre = 0.5 * (n - 1);
    INFO("shift (" << dx << ", " << dy << ") read (" << e.x - centre << ", " << e.y - centre << ")");
    worst = std::max({worst, std::abs(e.x - centre - dx), std::abs(e.y - centre - dy)});
    CHECK(std::abs(e.x - centre - dx) < 0.05);
    CHECK(std::abs(e.y - centre - dy) < 0.05);
    CHECK(e.quality > 0.5);  // a sharp match
  }
  INFO("largest error " << worst << " px");
  CHECK(worst < 0.05);
}

TEST_CASE("correlation marks a shift beyond its search range as failed", "[centroid][correlation]") {
  const int n = 15;
  core::CorrelationCentroider c(correlation(core::CorrelationMetric::kSdf, 2), n);
  const auto w = testing::spot_window(n, 7.0 + 3.5, 7.0, 1.4, 1e4);  // 3.5 px > search 2 px
  const core::SpotEstimate e = testing::measure(c, testing::square(w, n));
  CHECK(e.located);
  CHECK(e.failed);
}

// Border-ring background and the flux significance (daemon/core/metrics/background.h).
#include <catch2/catch.hpp>

#include <cmath>
#include <random>
#include <vector>

#include "daemon/core/metrics/background.h"
#include "daemon/core/pipeline/pipeline.h"

using namespace slopecast;

TEST_CASE("the border ring's level ignores a hot pixel and the spot inside", "[background]") {
  // 5 x 5 window: ring of 16 pixels at 10 ADU except one hot pixel (500);
  // interior 1000 (the spot). Clipped mean of the ring: 10 exactly.
  std::vector<float> w(25, 10.0f);
  for (int y = 1; y < 4; ++y)
    for (int x = 1; x < 4; ++x) w[y * 5 + x] = 1000.0f;
  w[0 * 5 + 2] = 500.0f;
  std::vector<float> scratch(2 * core::border_pixel_count(5, 5));
  const auto b = core::border_stats({w.data(), 5, 5, 5}, scratch);
  CHECK(core::border_pixel_count(5, 5) == 16);
  CHECK(b.n_border == 16);
  CHECK(b.n_kept == 15);
  CHECK(b.median_adu == 10.0f);
  CHECK(b.level_adu == 10.0f);
  // Identical ring values: the rms is floored at the rounding noise 1/sqrt(12).
  CHECK(b.sigma_adu == Approx(1.0 / std::sqrt(12.0)));
}

TEST_CASE("a NaN in the ring gives no statistics rather than a NaN level", "[background]") {
  std::vector<float> w(36, 3.0f);
  w[0] = std::nanf("");
  std::vector<float> scratch(2 * core::border_pixel_count(6, 6));
  const auto b = core::border_stats({w.data(), 6, 6, 6}, scratch);
  CHECK_FALSE(b.finite);
  CHECK(b.level_adu == 0.0f);
}

TEST_CASE("empty boxes' flux scatter matches the noise model behind the significance", "[background]") {
  // Derived (background.h): with the ring's clipped mean subtracted, the flux
  // of an empty N-pixel box has variance sigma^2 (N + N^2/n - 2N); for 15 px
  // boxes N = 225, n = 56 (clipping at 3.5 sigma keeps ~99.95 %):
  // sigma_F = 4 * sqrt(679) = 104.2 ADU at sigma = 4 ADU. Gaussian noise on
  // an f32 camera, 200 frames x 256 boxes: the sample rms has a relative
  // standard error 1/sqrt(2 * 51200) = 0.3 %; the bound 3 % leaves room for
  // the clip's slight truncation.
  core::PipelineSettings s;
  s.camera = {240, 240, core::PixelFormat::kF32};
  s.grid = {16, 16, 15, 0, 0};
  s.min_snr = 0.0;
  core::Pipeline p(s);
  auto m = p.make_measurement();
  std::mt19937_64 rng(11);
  std::normal_distribution<float> noise(50.0f, 4.0f);
  std::vector<float> f(240 * 240);
  double sum = 0, sum2 = 0;
  int n = 0, above_4 = 0;
  for (int k = 0; k < 200; ++k) {
    for (auto& v : f) v = noise(rng);
    p.measure({std::as_bytes(std::span(f)), 240, 240, 960, core::PixelFormat::kF32}, m);
    for (int i = 0; i < 256; ++i) {
      sum += m.flux_adu[i];
      sum2 += double(m.flux_adu[i]) * m.flux_adu[i];
      above_4 += m.snr[i] > 4.0f;
      ++n;
      // The level is a mean of ~56 pixels: rms 4/sqrt(56) = 0.53 ADU; 5 rms
      // is passed by 0.03 of 51 200 boxes on average.
      CHECK(m.background_adu[i] == Approx(50.0).margin(5.0 * 4.0 / std::sqrt(56.0)));
    }
  }
  const double rms = std::sqrt(sum2 / n - (sum / n) * (sum / n));
  UNSCOPED_INFO("empty-box flux rms " << rms << " ADU, model 104.2; boxes above 4 sigma: " << above_4);
  CHECK(rms == Approx(4.0 * std::sqrt(679.0)).epsilon(0.03));
  // A Gaussian exceeds 4 with probability 3.2e-5: 1.6 expected in 51 200;
  // more than 10 would mean the significance is inflated.
  CHECK(above_4 <= 10);
}

TEST_CASE("the significance formula on worked numbers", "[background]") {
  // N = 225, n = 56: 225 + 225^2/56 - 450 = 679.02; F = 521, sigma 1:
  // 521/sqrt(679.02) = 19.99. Without subtraction: 521/15 = 34.73.
  CHECK(core::flux_snr(521.0, 1.0, 225, 56, true) == Approx(19.994).epsilon(1e-4));
  CHECK(core::flux_snr(521.0, 1.0, 225, 56, false) == Approx(34.733).epsilon(1e-4));
  CHECK(core::flux_snr(-5.0, 1.0, 225, 56, true) == 0.0);
}

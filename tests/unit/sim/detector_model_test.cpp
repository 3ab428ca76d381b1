// The simulated detector's noise statistics.
#include <catch2/catch.hpp>

#include <cmath>

#include "client/sim/detector_model.h"
#include "client/sim/frame_bank.h"

using namespace slopecast;

TEST_CASE("exposures have Poisson plus read-noise statistics around the bias", "[sim][detector]") {
  // Derived: mean = N/g + bias; variance = (N + sigma_e^2)/g^2 + 1/12 (the
  // last from rounding to integer ADU). 40000 pixels: the variance estimate
  // has relative error sqrt(2/40000) = 0.7 %, so 4 % is ~6 standard errors.
  sim::DetectorModel d;
  d.read_noise_e = 4.0;
  d.gain_e_per_adu = 2.0;
  d.bias_adu = 300.0;
  const double n = 400.0;
  std::vector<double> expected(40000, n);
  std::vector<std::uint16_t> out(expected.size());
  std::mt19937_64 rng(11);
  sim::expose(expected, d, rng, out);
  double sum = 0, sum2 = 0;
  for (auto v : out) {
    sum += v;
    sum2 += double(v) * v;
  }
  const double mean = sum / out.size(), var = sum2 / out.size() - mean * mean;
  CHECK(mean == Approx(n / 2.0 + 300.0).margin(0.1));
  CHECK(var == Approx((n + 16.0) / 4.0 + 1.0 / 12.0).epsilon(0.04));
}

TEST_CASE("exposures saturate at full scale and never go below zero", "[sim][detector]") {
  sim::DetectorModel d;
  d.bias_adu = 0.0;
  d.read_noise_e = 50.0;
  d.full_scale_adu = 1000.0;
  std::vector<double> expected = {0.0, 0.0, 0.0, 5000.0};
  std::vector<std::uint16_t> out(4);
  std::mt19937_64 rng(1);
  sim::expose(expected, d, rng, out);
  CHECK(out[3] == 1000);
  // Zero signal with 50 e- read noise: about half the draws are negative and
  // must clamp to 0, not wrap around to ~65535.
  for (int i = 0; i < 3; ++i) CHECK(out[i] <= 200);
}

TEST_CASE("a mean dark converges on the bias", "[sim][detector]") {
  // Mean of 100 frames with 3 e- read noise: per-pixel scatter 0.3 ADU.
  sim::DetectorModel d;
  const auto dark = sim::make_mean_dark(d, 20, 10, 100, 5);
  double sum = 0;
  for (float v : dark) sum += v;
  CHECK(sum / dark.size() == Approx(100.0).margin(0.1));
}

TEST_CASE("detector settings are validated", "[sim][detector]") {
  sim::DetectorModel d;
  CHECK(sim::validate(d).empty());
  d.gain_e_per_adu = 0;
  CHECK_THAT(sim::validate(d), Catch::Contains("gain"));
}

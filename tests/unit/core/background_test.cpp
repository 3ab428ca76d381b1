// Border-ring background and the flux significance (daemon/core/metrics/background.h).
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <cstring>
#include <random>
#include <vector>

#include "daemon/core/frame/box_correction.h"
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
  std::vector<float> scratch(core::border_scratch_size(5, 5));
  const auto b = core::border_stats({w.data(), 5, 5, 5}, scratch);
  CHECK(core::border_pixel_count(5, 5) == 16);
  CHECK(b.n_border == 16);
  CHECK(b.n_kept == 15);
  CHECK(b.level_adu == 10.0f);
  // Identical ring values: the rms is floored at the rounding noise 1/sqrt(12).
  CHECK(b.sigma_adu == Approx(1.0 / std::sqrt(12.0)));
}

TEST_CASE("the median estimator on worked numbers, raw and corrected alike", "[background]") {
  // 5 x 5 window, ring of 16 pixels (in ring order it does not matter):
  // values 1..16, with 16 replaced by a hot 900. Median of 1..15, 900 =
  // (8 + 9)/2 = 8.5; absolute deviations 7.5, 6.5, ..., 0.5, 0.5, ..., 6.5,
  // 891.5: their median is (3.5 + 4.5)/2 = 4 -> sigma 1.4826 * 4.
  std::vector<float> w(25, 1000.0f);
  std::vector<float> ring_values;
  for (int k = 1; k <= 15; ++k) ring_values.push_back(static_cast<float>(k));
  ring_values.push_back(900.0f);
  int k = 0;
  for (int y = 0; y < 5; ++y)
    for (int x = 0; x < 5; ++x)
      if (x == 0 || y == 0 || x == 4 || y == 4) w[y * 5 + x] = ring_values[k++];
  std::vector<float> scratch(core::border_scratch_size(5, 5));
  const auto b = core::border_stats({w.data(), 5, 5, 5}, scratch, core::BackgroundMode::kBorderMedian);
  CHECK(b.level_adu == 8.5f);
  CHECK(b.sigma_adu == Approx(1.4826 * 4.0));
  CHECK(b.n_kept == 16);
  // The same from a raw u16 frame with a dark of 2 ADU (folded path).
  std::vector<std::uint16_t> raw(25);
  for (int i = 0; i < 25; ++i) raw[i] = static_cast<std::uint16_t>(w[i] + 2.0f);
  const std::vector<float> dark(16, 2.0f);
  const core::ImageView view{std::as_bytes(std::span(raw)), 5, 5, 10, core::PixelFormat::kU16};
  core::gather_border_raw(view, dark, core::Box{0, 0, 5, 5}, scratch.data());
  std::vector<float> soa(core::border_batch_scratch_size(16));
  core::BorderStats r;
  core::border_stats_batch(scratch.data(), core::border_scratch_size(5, 5), 1, 16, core::BackgroundMode::kBorderMedian,
                           std::span(&r, 1), soa, core::best_simd_level());
  CHECK(r.level_adu == 8.5f);
  CHECK(r.sigma_adu == b.sigma_adu);
  // Through the pipeline: a flat 40-ADU pedestal is gone.
  core::PipelineSettings ps;
  ps.camera = {30, 30, core::PixelFormat::kU16};
  ps.grid = {3, 3, 10, 0, 0};
  ps.background = core::BackgroundMode::kBorderMedian;
  ps.min_snr = 0.0;
  REQUIRE(core::validate(ps).empty());
  std::vector<std::uint16_t> frame(900, 40);
  frame[5 * 30 + 5] = 1040;  // one bright pixel at the centre of box (0, 0)'s interior
  core::Pipeline pipe(ps);
  auto m = pipe.make_measurement();
  pipe.measure({std::as_bytes(std::span(frame)), 30, 30, 60, core::PixelFormat::kU16}, m);
  CHECK(m.background_adu[0] == 40.0f);
  CHECK(m.flux_adu[0] == 1000.0f);
}

TEST_CASE("a NaN in the ring gives no statistics rather than a NaN level", "[background]") {
  std::vector<float> w(36, 3.0f);
  w[0] = std::nanf("");
  std::vector<float> scratch(core::border_scratch_size(6, 6));
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

TEST_CASE("a clean ring takes the short way to the same answer", "[background]") {
  // background.cpp: when every ring value lies within 2.5 rms of the ring
  // mean, the clipped estimate is the plain mean and sample rms (derived
  // there). Rings just inside and just outside that condition must agree
  // with a direct computation of the clipping rule (here: no value clipped,
  // so the mean and sample rms of all 16 values).
  for (double outlier : {1.0, 2.4, 2.6, 3.0}) {
    std::vector<float> w(25, 0.0f);
    // Ring values alternating +-1 (rms 1) with one at `outlier` x the rms.
    const int ring_idx[16] = {0, 1, 2, 3, 4, 20, 21, 22, 23, 24, 5, 9, 10, 14, 15, 19};
    for (int k = 0; k < 16; ++k) w[ring_idx[k]] = (k % 2 ? 1.0f : -1.0f);
    w[ring_idx[0]] = static_cast<float>(outlier);
    double sum = 0.0, ss = 0.0;
    for (int k = 0; k < 16; ++k) sum += w[ring_idx[k]];
    const double mean = sum / 16;
    for (int k = 0; k < 16; ++k) ss += (w[ring_idx[k]] - mean) * (w[ring_idx[k]] - mean);
    std::vector<float> scratch(core::border_scratch_size(5, 5));
    const auto b = core::border_stats({w.data(), 5, 5, 5}, scratch);
    INFO("outlier " << outlier);
    // None of these is 3.5 rms from the median, so nothing is clipped
    // whichever way is taken.
    CHECK(b.n_kept == 16);
    CHECK(b.level_adu == Approx(mean).margin(1e-6));
    CHECK(b.sigma_adu == Approx(std::sqrt(ss / 15)).epsilon(1e-6));
  }
}

namespace {

// The border procedure written plainly (background.h): median by sorting,
// then rounds of 3.5-sigma clipping about it until no pixel changes side,
// the first round taking every pixel; level = median + mean of the kept
// deviations, sigma their sample rms floored at 1/sqrt(12).
core::BorderStats reference_ring(std::vector<float> ring) {
  const int n = static_cast<int>(ring.size());
  std::vector<float> sorted = ring;
  std::sort(sorted.begin(), sorted.end());
  const double median = n % 2 ? sorted[n / 2] : 0.5 * (sorted[n / 2 - 1] + sorted[n / 2]);
  double clip = HUGE_VAL, mean_d = 0.0, var = 0.0;
  int kept = 0;
  for (int round = 0; round < 8; ++round) {
    double s1 = 0.0, s2 = 0.0;
    int k = 0;
    for (float v : ring) {
      const double d = static_cast<float>(v - median);
      if (std::abs(d) > clip) continue;
      s1 += d;
      s2 += d * d;
      ++k;
    }
    const bool stable = k == kept;
    kept = k;
    mean_d = s1 / kept;
    var = kept > 1 ? std::max((s2 - kept * mean_d * mean_d) / (kept - 1), 0.0) : 0.0;
    if (stable) break;
    clip = 3.5 * std::max(std::sqrt(s2 / kept), 1.0 / std::sqrt(12.0));
  }
  core::BorderStats b;
  b.level_adu = static_cast<float>(median + mean_d);
  b.n_kept = kept;
  b.sigma_adu = std::max(static_cast<float>(std::sqrt(var)), static_cast<float>(1.0 / std::sqrt(12.0)));
  return b;
}

}  // namespace

TEST_CASE("the ring statistics equal the plain procedure, short cuts included", "[background]") {
  // background.cpp skips the median when counting shows that no value can
  // be clipped (derived there). Random rings of 10 and 15 px boxes, clean or
  // with hot pixels, a spot tail along one side, or integer-valued data;
  // level and sigma agree to float rounding, the kept count exactly.
  std::mt19937 rng(8);
  std::normal_distribution<float> noise(0.0f, 3.0f);
  std::uniform_int_distribution<int> kind(0, 3);
  int checked = 0;
  for (int side : {10, 15}) {
    const int n = core::border_pixel_count(side, side);
    for (int trial = 0; trial < 3000; ++trial) {
      std::vector<float> w(static_cast<std::size_t>(side) * side, 0.0f);
      const int k = kind(rng);
      for (float& v : w) v = 100.0f + noise(rng);
      if (k == 1) w[static_cast<std::size_t>(rng() % side)] += 500.0f;  // a hot pixel on the top row
      if (k == 2)
        for (int x = 0; x < side; ++x) w[x] += 40.0f * std::exp(-0.1f * x);  // a tail along the top
      if (k == 3)
        for (float& v : w) v = std::round(v);
      std::vector<float> scratch(core::border_scratch_size(side, side));
      const auto got = core::border_stats({w.data(), side, side, side}, scratch);
      std::vector<float> ring(scratch.begin(), scratch.begin() + n);  // border_stats left the ring there
      const auto want = reference_ring(ring);
      INFO("side " << side << " trial " << trial << " kind " << k);
      REQUIRE(got.n_kept == want.n_kept);
      REQUIRE(got.level_adu == Approx(want.level_adu).margin(1e-3));
      REQUIRE(got.sigma_adu == Approx(want.sigma_adu).epsilon(1e-4));
      ++checked;
    }
  }
  CHECK(checked == 6000);
}

TEST_CASE("rings measured eight at a time equal each ring measured alone, bit for bit, on both builds",
          "[background][simd]") {
  // border_stats_batch() keeps every sum of ring_stats() in the same order
  // (one box per vector lane), so nothing may differ: not a rounding, not
  // a kept count. Mixed rings: clean noise, hot pixels and tails (which
  // leave the batch for the full procedure), integer values, NaN and
  // infinity, and run lengths that are not a multiple of eight.
  std::mt19937 rng(21);
  std::normal_distribution<float> noise(0.0f, 3.0f);
  int compared = 0, full_procedure = 0, non_finite = 0;
  for (int side : {5, 6, 10, 13, 15, 24}) {
    const int n = core::border_pixel_count(side, side), stride = core::border_scratch_size(side, side);
    for (int count : {1, 7, 8, 9, 20}) {
      std::vector<float> rings(static_cast<std::size_t>(count) * stride, 0.0f);
      std::vector<core::BorderStats> want(count);
      for (int i = 0; i < count; ++i) {
        float* r = rings.data() + static_cast<std::size_t>(i) * stride;
        const int kind = static_cast<int>(rng() % 6);
        for (int k = 0; k < n; ++k) r[k] = 100.0f + noise(rng);
        if (kind == 1) r[rng() % n] += 400.0f;
        if (kind == 2)
          for (int k = 0; k < side; ++k) r[k] += 50.0f * std::exp(-0.3f * k);
        if (kind == 3)
          for (int k = 0; k < n; ++k) r[k] = std::round(r[k]);
        if (kind == 4) r[rng() % n] = NAN;
        if (kind == 5) r[rng() % n] = -INFINITY;
        // What one ring alone gives (border_stats() of a window whose border is this ring).
        std::vector<float> scratch(stride);
        std::copy(r, r + n, scratch.begin());
        std::vector<float> window(static_cast<std::size_t>(side) * side, 0.0f);
        int k = 0;
        for (int x = 0; x < side; ++x) window[x] = r[k++];
        for (int x = 0; x < side; ++x) window[static_cast<std::size_t>(side - 1) * side + x] = r[k++];
        for (int y = 1; y < side - 1; ++y) {
          window[static_cast<std::size_t>(y) * side] = r[k++];
          window[static_cast<std::size_t>(y) * side + side - 1] = r[k++];
        }
        want[i] = core::border_stats({window.data(), side, side, side}, scratch);
        full_procedure += want[i].finite && want[i].n_kept < n;
        non_finite += !want[i].finite;
      }
      for (auto level : {core::SimdLevel::kBaseline, core::SimdLevel::kAvx2}) {
        if (level == core::SimdLevel::kAvx2 && core::best_simd_level() != core::SimdLevel::kAvx2) continue;
        std::vector<float> work(rings);  // the batch overwrites its rings
        std::vector<float> soa(core::border_batch_scratch_size(n));
        std::vector<core::BorderStats> got(count);
        core::border_stats_batch(work.data(), stride, count, n, core::BackgroundMode::kBorder, got, soa, level);
        for (int i = 0; i < count; ++i) {
          INFO("side " << side << " count " << count << " box " << i << " " << core::simd_level_name(level));
          REQUIRE(got[i].finite == want[i].finite);
          REQUIRE(got[i].n_border == want[i].n_border);
          REQUIRE(got[i].n_kept == want[i].n_kept);
          REQUIRE(std::memcmp(&got[i].level_adu, &want[i].level_adu, sizeof(float)) == 0);
          REQUIRE(std::memcmp(&got[i].sigma_adu, &want[i].sigma_adu, sizeof(float)) == 0);
          ++compared;
        }
      }
    }
  }
  CHECK(compared >= 6 * 45);
  CHECK(full_procedure > 10);  // hot pixels and tails did leave the batch
  CHECK(non_finite > 10);
}

TEST_CASE("the flux significance on vector lanes is flux_snr's value, bit for bit", "[background][simd]") {
  // The pipeline evaluates flux_snr_of four boxes per vector; each lane must
  // equal the scalar flux_snr(), including no flux, no noise, an empty
  // ring (n_kept 0) and the floor of the variance at 1.
  typedef double D4 __attribute__((vector_size(32)));
  const auto lane_root = [](const D4& v, D4& out) {
    for (int k = 0; k < 4; ++k) out[k] = std::sqrt(v[k]);
  };
  const double flux[] = {521.0, -5.0, 0.0, 3e4, 12.5, 800.0, 1.0, 7.0};
  const double sigma[] = {1.0, 1.0, 2.0, 0.0, 3.3, 1e-3, 0.29, 4.0};
  const int ring[] = {56, 56, 36, 36, 0, 1, 12, 100};
  for (bool subtracted : {true, false})
    for (int first = 0; first < 8; first += 4) {
      D4 f, s, r, got;
      for (int k = 0; k < 4; ++k) {
        f[k] = flux[first + k];
        s[k] = sigma[first + k];
        r[k] = ring[first + k];
      }
      core::flux_snr_of(f, s, 225, r, subtracted, lane_root, got);
      for (int k = 0; k < 4; ++k) {
        const double want = core::flux_snr(f[k], s[k], 225, ring[first + k], subtracted);
        INFO("case " << first + k << " subtracted " << subtracted);
        CHECK(std::memcmp(&got[k], &want, sizeof want) == 0);
      }
    }
}

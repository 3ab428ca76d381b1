// The folded path: integer column sums of raw u8/u16 pixels, the dark and
// the background folded into per-box constants, kernels for two instruction
// sets, and the pipeline split into lanes. Each is checked against the
// straightforward computation it replaces.
#include <catch2/catch.hpp>

#include <cstring>
#include <random>

#include "client/sim/detector_model.h"
#include "client/sim/spot_field.h"
#include "daemon/core/frame/raw_columns.h"
#include "daemon/core/metrics/window_moments.h"
#include "daemon/core/pipeline/pipeline.h"

using namespace slopecast;

namespace {

std::vector<core::SimdLevel> levels() {
  std::vector<core::SimdLevel> v{core::SimdLevel::kBaseline};
  if (core::best_simd_level() == core::SimdLevel::kAvx2) v.push_back(core::SimdLevel::kAvx2);
  return v;
}

}  // namespace

TEST_CASE("raw column sums equal the direct sums of v, y v and y^2 v, on every kernel", "[folded]") {
  // Derived in raw_columns.h: from the running sums S, T, U, sum y v =
  // H S - T and sum y^2 v = H^2 S - 2 H T + 2 U - T, formed modulo 2^32 and
  // exact while the value fits (H <= 56 for u16). Full-scale pixels at the
  // largest height test that bound.
  std::mt19937 rng(4);
  for (auto [format, h, full] : {std::tuple{core::PixelFormat::kU16, 15, 65535u}, std::tuple{core::PixelFormat::kU16, 56, 65535u},
                                 std::tuple{core::PixelFormat::kU8, 10, 255u}, std::tuple{core::PixelFormat::kU8, 56, 255u}}) {
    const int width = 53, height = h + 3, x0 = 2, y0 = 1, w = 37;  // 37 = two chunks of 16 and a tail of 5
    const std::size_t bpp = core::bytes_per_pixel(format);
    std::vector<std::byte> bytes(static_cast<std::size_t>(width) * height * bpp);
    std::uniform_int_distribution<std::uint32_t> value(0, full);
    std::vector<std::uint32_t> truth(static_cast<std::size_t>(width) * height);
    for (std::size_t i = 0; i < truth.size(); ++i) {
      truth[i] = i % 97 == 0 || i % 5 == 0 ? full : value(rng);  // full-scale pixels test the overflow bound
      if (bpp == 1) bytes[i] = static_cast<std::byte>(truth[i]);
      else {
        const auto v = static_cast<std::uint16_t>(truth[i]);
        std::memcpy(&bytes[2 * i], &v, 2);
      }
    }
    const core::ImageView image{bytes, width, height, width * bpp, format};
    REQUIRE(core::raw_columns_exact(format, h));
    for (core::SimdLevel level : levels()) {
      std::vector<std::uint32_t> s(w), sy(w), syy(w), mx(w);
      core::raw_column_kernel(format, level)(image, x0, y0, w, h, {s.data(), sy.data(), syy.data(), mx.data()});
      for (int x = 0; x < w; ++x) {
        std::uint64_t sv = 0, syv = 0, syyv = 0, m = 0;
        for (int y = 0; y < h; ++y) {
          const std::uint64_t v = truth[static_cast<std::size_t>(y0 + y) * width + x0 + x];
          sv += v;
          syv += y * v;
          syyv += static_cast<std::uint64_t>(y) * y * v;
          m = std::max(m, v);
        }
        INFO(core::simd_level_name(level) << " h " << h << " column " << x);
        CHECK(s[x] == sv);
        CHECK(sy[x] == syv);
        CHECK(syy[x] == syyv);
        CHECK(mx[x] == m);
      }
    }
  }
}

namespace {

struct Frames {
  core::PipelineSettings u16, f32;
  std::vector<std::uint16_t> raw;
  std::vector<float> as_float;
  core::ImageView u16_view() const {
    return {std::as_bytes(std::span(raw)), u16.camera.width_px, u16.camera.height_px,
            static_cast<std::size_t>(u16.camera.width_px) * 2, core::PixelFormat::kU16};
  }
  core::ImageView f32_view() const {
    return {std::as_bytes(std::span(as_float)), f32.camera.width_px, f32.camera.height_px,
            static_cast<std::size_t>(f32.camera.width_px) * 4, core::PixelFormat::kF32};
  }
};

// A 12 x 10 grid of 15 px boxes with a non-uniform dark (a gradient and hot
// pixels), bias, read noise and background light; the same pixels as u16
// and as f32.
Frames frames(core::CentroiderKind kind) {
  Frames f;
  auto& s = f.u16;
  s.camera = {12 * 15 + 3, 10 * 15 + 2, core::PixelFormat::kU16};
  s.grid = {12, 10, 15, 1, 2};
  s.centroider.kind = kind;
  s.centroider.spot_sigma_px = 1.0;
  s.centroider.search_px = 3;
  s.saturation_adu = 3000.0;
  const std::size_t n = static_cast<std::size_t>(s.camera.width_px) * s.camera.height_px;
  s.dark_adu.resize(n);
  for (std::size_t i = 0; i < n; ++i) s.dark_adu[i] = 95.0f + 0.01f * static_cast<float>(i % 183) + (i % 311 == 0 ? 400.0f : 0.0f);
  sim::SpotFieldSettings field;
  field.grid = s.grid;
  field.spot_sigma_px = 1.0;
  field.photons_per_spot = 2e4;
  std::mt19937_64 rng(12);
  auto expected = sim::render_spot_field(field, sim::draw_offsets(field, rng), s.camera.width_px, s.camera.height_px);
  std::normal_distribution<double> noise(0.0, 3.0);
  f.raw.resize(n);
  f.as_float.resize(n);
  for (std::size_t i = 0; i < n; ++i) {
    const double v = std::clamp(std::round(expected[i] + s.dark_adu[i] + 20.0 + noise(rng)), 0.0, 65535.0);
    f.raw[i] = static_cast<std::uint16_t>(v);
    f.as_float[i] = static_cast<float>(v);
  }
  f.f32 = s;
  f.f32.camera.format = core::PixelFormat::kF32;
  return f;
}

}  // namespace

TEST_CASE("the folded path measures what the corrected float path measures", "[folded]") {
  // The same pixels as u16 (integer sums, dark and background folded out)
  // and as f32 (corrected strip, float column sums): the methods see the
  // same numbers, so they agree to float rounding: the methods that read
  // the corrected strip exactly (the same strip on both), the CoG to the
  // float column sums of the plain path (15 terms of ~2e4 ADU: relative
  // 1e-7, times a 7 px lever arm; measured 3.6e-7 px). Tolerances: slopes
  // 2e-6 px, flux 1e-5 relative.
  for (core::CentroiderKind kind : core::kAllCentroiderKinds) {
    const Frames f = frames(kind);
    for (core::SimdLevel level : levels()) {
      core::Pipeline folded(f.u16, 1, level), plain(f.f32);
      REQUIRE(folded.folded());
      REQUIRE_FALSE(plain.folded());
      CHECK(folded.needs_pixels() == (kind != core::CentroiderKind::kCog));
      auto a = folded.make_measurement(), b = plain.make_measurement();
      folded.measure(f.u16_view(), a);
      plain.measure(f.f32_view(), b);
      INFO(core::centroider_name(kind) << " " << core::simd_level_name(level));
      CHECK(a.n_valid == b.n_valid);
      CHECK(a.n_valid > 100);
      CHECK(a.n_saturated == b.n_saturated);
      double worst = 0.0;
      for (int i = 0; i < a.size(); ++i) {
        CHECK(a.flags[i] == b.flags[i]);
        worst = std::max({worst, std::abs(static_cast<double>(a.slope_x_px[i]) - b.slope_x_px[i]),
                          std::abs(static_cast<double>(a.slope_y_px[i]) - b.slope_y_px[i])});
        CHECK(a.flux_adu[i] == Approx(b.flux_adu[i]).epsilon(1e-5).margin(1e-2));
        CHECK(a.peak_adu[i] == b.peak_adu[i]);  // the raw maximum on both paths
        CHECK(a.background_adu[i] == b.background_adu[i]);
        CHECK(a.fwhm_x_px[i] == Approx(b.fwhm_x_px[i]).epsilon(1e-4).margin(1e-4));
        CHECK(a.saturated_pixels[i] == b.saturated_pixels[i]);
      }
      UNSCOPED_INFO(core::centroider_name(kind) << ": largest slope difference " << worst << " px");
      CHECK(worst < 2e-6);
    }
  }
}

TEST_CASE("rows measured on several lanes give exactly what one lane gives", "[folded][lanes]") {
  // Lanes share no writable scratch and each box is computed the same way
  // whichever lane takes its row: the results are identical, not just close.
  for (core::CentroiderKind kind : {core::CentroiderKind::kCog, core::CentroiderKind::kWeighted}) {
    const Frames f = frames(kind);
    core::Pipeline one(f.u16), three(f.u16, 3);
    auto a = one.make_measurement(), b = three.make_measurement();
    one.measure(f.u16_view(), a);
    three.measure_runs(f.u16_view(), 0, 4, 0);
    three.measure_runs(f.u16_view(), 7, 10, 2);  // any order
    three.measure_runs(f.u16_view(), 4, 7, 1);
    three.finish(b);
    CHECK(a.slope_x_px == b.slope_x_px);
    CHECK(a.slope_y_px == b.slope_y_px);
    CHECK(a.flags == b.flags);
    CHECK(a.flux_adu == b.flux_adu);
    CHECK(a.n_valid == b.n_valid);
  }
}

TEST_CASE("box moments formed four boxes at a time equal each box's alone, bit for bit, on both builds",
          "[folded][simd]") {
  // folded_moments_run() does folded_moments()'s arithmetic with one box
  // per vector lane, in the same order, and its integer sums in 32-bit
  // lanes where box_sums_fit_32 allows: nothing may differ. Full-scale
  // pixels at 21 px (the largest u16 box whose sums fit in 32 bits) test
  // that bound; 24 px takes the 64-bit sums. Dark and level make some
  // boxes' flux zero or negative (not located).
  std::mt19937 rng(31);
  CHECK(core::box_sums_fit_32(21, 21, 65535));
  CHECK_FALSE(core::box_sums_fit_32(22, 22, 65535));
  CHECK(core::box_sums_fit_32(56, 56, 255));
  int compared = 0, unlocated = 0;
  for (int p : {5, 10, 21, 24}) {
    for (int count : {1, 3, 4, 9}) {
      const int width = count * p, h = p;
      std::vector<std::uint16_t> raw(static_cast<std::size_t>(width) * h);
      std::uniform_int_distribution<int> value(0, 65535);
      for (std::size_t i = 0; i < raw.size(); ++i) raw[i] = static_cast<std::uint16_t>(i % 7 == 0 ? 65535 : value(rng) % 400);
      const core::ImageView image{std::as_bytes(std::span(raw)), width, h, static_cast<std::size_t>(width) * 2,
                                  core::PixelFormat::kU16};
      std::vector<std::uint32_t> s(width + core::kRawColumnSlack), sy(s.size()), syy(s.size()), mx(s.size());
      const core::RawColumns cols{s.data(), sy.data(), syy.data(), mx.data()};
      core::raw_column_kernel(core::PixelFormat::kU16, core::SimdLevel::kBaseline)(image, 0, 0, width, h, cols);
      std::vector<core::FoldedDark> dark(count);
      std::vector<float> level(count);
      for (int k = 0; k < count; ++k) {
        std::vector<float> d(static_cast<std::size_t>(p) * p, 30.0f + 5.0f * k);
        dark[k] = core::fold_dark(d, p, 0, 0, p, p);
        level[k] = k % 3 == 2 ? 1e6f : 0.37f * k;  // a level far above the light: flux < 0
      }
      const bool fits = core::box_sums_fit_32(p, p, 65535);
      for (core::SimdLevel simd : levels()) {
        std::vector<core::WindowMoments> got(count);
        core::folded_moments_run(cols, count, p, h, dark.data(), level.data(), fits, simd, got.data());
        for (int k = 0; k < count; ++k) {
          const core::WindowMoments want = core::folded_moments(cols, k * p, p, h, dark[k], level[k]);
          INFO("p " << p << " count " << count << " box " << k << " " << core::simd_level_name(simd));
          REQUIRE(got[k].located == want.located);
          for (auto [a, b] : {std::pair{got[k].flux, want.flux}, std::pair{got[k].peak, want.peak},
                              std::pair{got[k].cx, want.cx}, std::pair{got[k].cy, want.cy},
                              std::pair{got[k].var_x, want.var_x}, std::pair{got[k].var_y, want.var_y},
                              std::pair{got[k].cov_xy, want.cov_xy}})
            REQUIRE(std::memcmp(&a, &b, sizeof a) == 0);
          unlocated += !want.located;
          ++compared;
        }
      }
    }
  }
  CHECK(compared >= 4 * 17);
  CHECK(unlocated > 0);
}

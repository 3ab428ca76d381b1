// The whole per-frame computation: raw frame -> slopes, flux, validity.
#include <catch2/catch.hpp>

#include <cmath>
#include <cstring>
#include <limits>

#include "client/sim/spot_field.h"
#include "daemon/core/pipeline.h"

using namespace slopecast;
using core::PixelFormat;

namespace {

// 4 x 3 subapertures of 12 px on a 52 x 40 camera, grid origin (2, 3), so the
// boxes do not start at the frame corner.
core::PipelineSettings settings(PixelFormat f) {
  core::PipelineSettings s;
  s.camera = {52, 40, f};
  s.grid = {4, 3, 12, 2, 3};
  s.min_flux_adu = 100.0;
  return s;
}

sim::SpotOffsets offsets_for(const core::LensletGrid& g) {
  sim::SpotOffsets o;
  for (int i = 0; i < g.count(); ++i) {
    o.dx_px.push_back(-1.2 + 0.21 * i);  // distinct, sub-pixel, both signs
    o.dy_px.push_back(0.9 - 0.17 * i);
  }
  return o;
}

// Noiseless frame of expected values + bias, stored as format f with the
// given row stride (bytes), little-endian.
std::vector<std::byte> make_frame(const core::PipelineSettings& s, const sim::SpotOffsets& o, double photons,
                                  double bias, std::size_t stride) {
  sim::SpotFieldSettings field;
  field.grid = s.grid;
  field.spot_sigma_px = 1.1;
  field.photons_per_spot = photons;
  const auto img = sim::render_spot_field(field, o, s.camera.width_px, s.camera.height_px);
  std::vector<std::byte> bytes(stride * s.camera.height_px, std::byte{0xEE});
  for (int y = 0; y < s.camera.height_px; ++y)
    for (int x = 0; x < s.camera.width_px; ++x) {
      const double v = img[static_cast<std::size_t>(y) * s.camera.width_px + x] + bias;
      std::byte* p = bytes.data() + y * stride + x * core::bytes_per_pixel(s.camera.format);
      switch (s.camera.format) {
        case PixelFormat::kU8: { auto q = static_cast<std::uint8_t>(std::lround(std::min(v, 255.0))); std::memcpy(p, &q, 1); break; }
        case PixelFormat::kU16: { auto q = static_cast<std::uint16_t>(std::lround(v)); std::memcpy(p, &q, 2); break; }
        case PixelFormat::kU32: { auto q = static_cast<std::uint32_t>(std::lround(v)); std::memcpy(p, &q, 4); break; }
        case PixelFormat::kF32: { auto q = static_cast<float>(v); std::memcpy(p, &q, 4); break; }
      }
    }
  return bytes;
}

core::ImageView view(const std::vector<std::byte>& bytes, const core::PipelineSettings& s, std::size_t stride) {
  return {bytes, s.camera.width_px, s.camera.height_px, stride, s.camera.format};
}

}  // namespace

TEST_CASE("slopes of a noiseless frame are the spot offsets, for every pixel type", "[pipeline]") {
  // Derived: slope = CoG - box centre = the offset the spot was drawn at,
  // except for (a) truncation: the spot (sigma 1.1 px) comes within 3.9
  // sigma of a box edge, which moves a truncated Gaussian's mean by
  // sigma*phi(3.9)/Phi(3.9) = 2.2e-4 px; (b) rounding the frame to integers:
  // about sqrt(25/12)/N_ph px from the ~25 lit pixels, plus a bias from
  // tail pixels below 0.5 rounding to 0 (measured 4e-2 px at 150 photons,
  // hence 1500 here, peak 183 ADU, measured worst 6.5e-3 px): 1e-2 for u8;
  // for u16/u32 at 2e4 photons ~7e-5 px.
  for (auto [format, photons, tolerance] : {std::tuple{PixelFormat::kU8, 1500.0, 1e-2},
                                            std::tuple{PixelFormat::kU16, 2e4, 1e-3},
                                            std::tuple{PixelFormat::kU32, 2e4, 1e-3},
                                            std::tuple{PixelFormat::kF32, 2e4, 5e-4}}) {
    auto s = settings(format);
    const std::size_t stride = s.camera.width_px * core::bytes_per_pixel(format) + 6;  // padded rows
    const auto o = offsets_for(s.grid);
    const auto frame = make_frame(s, o, photons, 0.0, stride);
    core::Pipeline p(s);
    auto m = p.make_measurement();
    p.measure(view(frame, s, stride), m);
    INFO("format " << core::pixel_format_name(format));
    REQUIRE(m.n_valid == 12);
    for (int i = 0; i < 12; ++i) {
      CHECK(m.slope_x_px[i] == Approx(o.dx_px[i]).margin(tolerance));
      CHECK(m.slope_y_px[i] == Approx(o.dy_px[i]).margin(tolerance));
      CHECK(m.flags[i] == core::kFlagNone);
    }
  }
}

TEST_CASE("the dark frame is subtracted before centroiding", "[pipeline]") {
  // A uniform pedestal B left in an N_s^2 box pulls the CoG toward the box
  // centre by the factor N_ph/(N_ph + B N_s^2) (shared/checks.md 1.5,
  // derived). With B = 200 ADU, N_s = 12, N_ph = 2e4 the gain would be 0.41;
  // with the dark subtracted it is 1.
  auto s = settings(PixelFormat::kU16);
  const auto o = offsets_for(s.grid);
  const std::size_t stride = s.camera.width_px * 2;
  const auto frame = make_frame(s, o, 2e4, 200.0, stride);
  const double gain = 2e4 / (2e4 + 200.0 * 144);

  SECTION("without a dark the slopes shrink by the predicted gain") {
    core::Pipeline p(s);
    auto m = p.make_measurement();
    p.measure(view(frame, s, stride), m);
    for (int i = 0; i < 12; ++i) CHECK(m.slope_x_px[i] == Approx(gain * o.dx_px[i]).margin(2e-3));
  }
  SECTION("with the dark they are the offsets") {
    s.dark_adu.assign(static_cast<std::size_t>(52) * 40, 200.0f);
    core::Pipeline p(s);
    auto m = p.make_measurement();
    p.measure(view(frame, s, stride), m);
    for (int i = 0; i < 12; ++i) {
      CHECK(m.slope_x_px[i] == Approx(o.dx_px[i]).margin(1e-3));
      CHECK(m.flux_adu[i] == Approx(2e4).epsilon(1e-3));
    }
  }
}

TEST_CASE("faint subapertures are flagged, zeroed and left out of the statistics", "[pipeline]") {
  auto s = settings(PixelFormat::kF32);
  s.min_flux_adu = 5000.0;
  const std::size_t stride = s.camera.width_px * 4;
  const auto o = offsets_for(s.grid);
  auto frame = make_frame(s, o, 1e4, 0.0, stride);
  // Dim subaperture 5 (ix 1, iy 1: box columns 14..25, rows 15..26) to 10 %.
  for (int y = 15; y < 27; ++y)
    for (int x = 14; x < 26; ++x) {
      float v;
      std::memcpy(&v, frame.data() + y * stride + x * 4, 4);
      v *= 0.1f;
      std::memcpy(frame.data() + y * stride + x * 4, &v, 4);
    }
  core::Pipeline p(s);
  auto m = p.make_measurement();
  p.measure(view(frame, s, stride), m);
  CHECK(m.n_valid == 11);
  CHECK(m.flags[5] == core::kFlagLowFlux);
  CHECK(m.slope_x_px[5] == 0.0f);
  CHECK(m.slope_y_px[5] == 0.0f);
  CHECK(m.flux_adu[5] == Approx(1e3).epsilon(1e-3));
  // Statistics: rms of the 11 valid offsets.
  double sx2 = 0;
  for (int i = 0; i < 12; ++i)
    if (i != 5) sx2 += o.dx_px[i] * o.dx_px[i];
  CHECK(m.slope_rms_x_px == Approx(std::sqrt(sx2 / 11)).margin(1e-4));
  CHECK(m.mean_flux_adu == Approx(1e4).epsilon(1e-3));
}

TEST_CASE("a NaN pixel invalidates its subaperture without a NaN in the output", "[pipeline]") {
  auto s = settings(PixelFormat::kF32);
  const std::size_t stride = s.camera.width_px * 4;
  auto frame = make_frame(s, offsets_for(s.grid), 1e4, 0.0, stride);
  const float nan = std::numeric_limits<float>::quiet_NaN();
  std::memcpy(frame.data() + 4 * stride + 3 * 4, &nan, 4);  // (3, 4): subaperture 0
  core::Pipeline p(s);
  auto m = p.make_measurement();
  p.measure(view(frame, s, stride), m);
  CHECK(m.flags[0] == core::kFlagNonFinite);
  CHECK(m.n_valid == 11);
  for (int i = 0; i < 12; ++i) {
    CHECK(std::isfinite(m.slope_x_px[i]));
    CHECK(std::isfinite(m.flux_adu[i]));
    CHECK(std::isfinite(m.peak_adu[i]));
  }
  CHECK(std::isfinite(m.slope_rms_x_px));
}

TEST_CASE("pipeline settings are validated with a reason", "[pipeline]") {
  auto s = settings(PixelFormat::kU16);
  CHECK(core::validate(s).empty());
  SECTION("dark of the wrong size") {
    s.dark_adu.assign(10, 0.0f);
    CHECK_THAT(core::validate(s), Catch::Contains("dark frame has 10 pixels"));
  }
  SECTION("NaN in the dark") {
    s.dark_adu.assign(52 * 40, 0.0f);
    s.dark_adu[7] = std::numeric_limits<float>::quiet_NaN();
    CHECK_THAT(core::validate(s), Catch::Contains("NaN"));
  }
  SECTION("negative minimum flux") {
    s.min_flux_adu = -1;
    CHECK_THAT(core::validate(s), Catch::Contains("min_flux_adu"));
  }
  SECTION("grid outside the camera") {
    s.grid.n_subap_x = 5;
    CHECK_THAT(core::validate(s), Catch::Contains("does not fit"));
  }
}

// The whole per-frame computation: raw frame -> slopes, flux, validity.
#include <catch2/catch.hpp>

#include <cmath>
#include <cstring>
#include <limits>
#include <random>

#include "client/sim/detector_model.h"
#include "client/sim/spot_field.h"
#include "daemon/core/pipeline/pipeline.h"

using namespace slopecast;
using core::PixelFormat;

namespace {

// 4 x 3 subapertures of 12 px on a 52 x 40 camera, grid origin (2, 3), so the
// boxes do not start at the frame corner. Background estimation is off: the
// spots here come within 3.9 sigma of a box edge, so a few ADU of their tails
// reach the border ring, and these tests check the CoG and the flags to
// 1e-3 px without that (the border background has its own tests below).
core::PipelineSettings settings(PixelFormat f) {
  core::PipelineSettings s;
  s.camera = {52, 40, f};
  s.grid = {4, 3, 12, 2, 3};
  s.min_flux_adu = 100.0;
  s.background = core::BackgroundMode::kNone;
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
  // centre by the factor N_ph/(N_ph + B N_s^2) (tests/REFERENCES.md R1.5,
  // derived). With B = 200 ADU, N_s = 12, N_ph = 2e4 the gain would be 0.41;
  // with the dark subtracted it is 1. (Background estimation is off in
  // settings(), so the dark alone is tested.)
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
  SECTION("border background in boxes too small for a ring and an interior") {
    s.background = core::BackgroundMode::kBorder;
    s.grid.pitch_px = 4;
    CHECK_THAT(core::validate(s), Catch::Contains("pitch_px >= 5"));
  }
  SECTION("negative SNR floor, fraction above 1, zero saturation") {
    s.min_snr = -1;
    CHECK_THAT(core::validate(s), Catch::Contains("min_snr"));
    s.min_snr = 5;
    s.min_valid_fraction = 1.5;
    CHECK_THAT(core::validate(s), Catch::Contains("min_valid_fraction"));
    s.min_valid_fraction = 0.5;
    s.saturation_adu = 0.0;
    CHECK_THAT(core::validate(s), Catch::Contains("saturation_adu"));
  }
}

namespace {

// A noisy u16 frame as a bench camera gives it: bias + diffuse background
// light + spots, photon and read noise, no dark available.
struct NoisyBench {
  core::PipelineSettings settings;
  std::vector<std::vector<std::uint16_t>> frames;
  std::vector<sim::SpotOffsets> truth;
};

NoisyBench noisy_bench(double photons, double background_e_per_px, int n_frames) {
  NoisyBench b;
  b.settings.camera = {240, 240, PixelFormat::kU16};
  b.settings.grid = {16, 16, 15, 0, 0};
  sim::SpotFieldSettings field;
  field.grid = b.settings.grid;
  field.spot_sigma_px = 0.9;
  field.photons_per_spot = photons;
  field.max_offset_px = 1.5;
  sim::DetectorModel det;  // 3 e- read noise, gain 1, bias 100 ADU
  std::mt19937_64 rng(2024);
  for (int k = 0; k < n_frames; ++k) {
    auto o = sim::draw_offsets(field, rng);
    auto img = sim::render_spot_field(field, o, 240, 240);
    for (double& v : img) v += background_e_per_px;
    std::vector<std::uint16_t> f(img.size());
    sim::expose(img, det, rng, f);
    b.frames.push_back(std::move(f));
    b.truth.push_back(std::move(o));
  }
  return b;
}

core::ImageView u16_view(const std::vector<std::uint16_t>& f, int w, int h) {
  return {std::as_bytes(std::span(f)), w, h, static_cast<std::size_t>(w) * 2, PixelFormat::kU16};
}

// Least-squares gain of measured on true offsets (through the origin) over
// the valid subapertures of every frame, x and y together.
double fitted_gain(core::Pipeline& p, const NoisyBench& b, int* n_used) {
  auto m = p.make_measurement();
  double st = 0, tt = 0;
  *n_used = 0;
  for (std::size_t k = 0; k < b.frames.size(); ++k) {
    p.measure(u16_view(b.frames[k], 240, 240), m);
    for (int i = 0; i < m.size(); ++i) {
      if (m.flags[i] != core::kFlagNone) continue;
      st += m.slope_x_px[i] * b.truth[k].dx_px[i] + m.slope_y_px[i] * b.truth[k].dy_px[i];
      tt += b.truth[k].dx_px[i] * b.truth[k].dx_px[i] + b.truth[k].dy_px[i] * b.truth[k].dy_px[i];
      ++*n_used;
    }
  }
  return st / tt;
}

}  // namespace

TEST_CASE("without a dark, the border background restores unit gain", "[pipeline][background]") {
  // 480 ADU of background light per 15 x 15 box (2.13 e-/px at gain 1) on a
  // 100 ADU bias, no dark. Left in, bias + light (B = 102.13 ADU/px, N =
  // 225) pull the CoG toward the box centre by F/(F + B N) (R1.5, derived):
  // 0.465 at F = 2e4. With the border median subtracted, the residual is the
  // median's error: rms 1.2533 * sqrt(9 + 2.13)/sqrt(56) = 0.56 ADU/px, i.e.
  // +-126 ADU per box, random in sign, so the fitted gain over 2560 boxes is
  // 1 within well under 2 % (the acceptance figure).
  const NoisyBench b = noisy_bench(2e4, 480.0 / 225.0, 10);
  int used = 0;
  SECTION("border median on (the default)") {
    core::Pipeline p(b.settings);
    const double gain = fitted_gain(p, b, &used);
    UNSCOPED_INFO("gain with border background " << gain << " over " << used << " subapertures");
    CHECK(used == 2560);
    CHECK(gain == Approx(1.0).margin(0.02));
  }
  SECTION("border median off: the pedestal's predicted pull") {
    auto s = b.settings;
    s.background = core::BackgroundMode::kNone;
    core::Pipeline p(s);
    const double gain = fitted_gain(p, b, &used);
    const double predicted = 2e4 / (2e4 + (100.0 + 480.0 / 225.0) * 225);
    CHECK(gain == Approx(predicted).epsilon(0.02));
  }
}

TEST_CASE("with the light off, no subaperture is valid and the frame says no light", "[pipeline][background]") {
  // Bias + read noise only. The flux of an empty box is noise with a
  // significance close to N(0,1) (background.h); the floor of 5 is passed
  // with probability ~3e-7 per box, so none of 2560 boxes may pass.
  const NoisyBench b = noisy_bench(0.0, 480.0 / 225.0, 10);
  core::Pipeline p(b.settings);
  auto m = p.make_measurement();
  for (const auto& f : b.frames) {
    p.measure(u16_view(f, 240, 240), m);
    CHECK(m.n_valid == 0);
    CHECK((m.health & core::kHealthNoLight) != 0);
    CHECK((m.health & core::kHealthFewValid) != 0);
    for (int i = 0; i < m.size(); ++i) {
      CHECK(m.flags[i] != core::kFlagNone);
      CHECK(m.slope_x_px[i] == 0.0f);
    }
  }
}

TEST_CASE("frames that cannot be right publish no valid slope", "[pipeline][background]") {
  core::PipelineSettings s;
  s.camera = {240, 240, PixelFormat::kU16};
  s.grid = {16, 16, 15, 0, 0};
  core::Pipeline p(s);
  auto m = p.make_measurement();
  SECTION("an all-65535 frame is saturated everywhere") {
    const std::vector<std::uint16_t> f(240 * 240, 65535);
    p.measure(u16_view(f, 240, 240), m);
    CHECK(m.n_valid == 0);
    CHECK(m.n_saturated == 256);
    for (int i = 0; i < 256; ++i) CHECK((m.flags[i] & core::kFlagSaturated) != 0);
    CHECK((m.health & core::kHealthSaturated) != 0);
    CHECK((m.health & core::kHealthNoLight) != 0);
  }
  SECTION("a frame of random values") {
    std::mt19937_64 rng(5);
    std::uniform_int_distribution<int> u(0, 65534);
    std::vector<std::uint16_t> f(240 * 240);
    for (auto& v : f) v = static_cast<std::uint16_t>(u(rng));
    p.measure(u16_view(f, 240, 240), m);
    CHECK(m.n_valid == 0);
    CHECK((m.health & core::kHealthNoLight) != 0);
  }
}

TEST_CASE("a centroid outside its box is flagged, not published", "[pipeline]") {
  // Background off and no floors, so only the geometry can refuse it: +100
  // at column 0 and -95 at column 11 of a 12 px box give a flux of 5 and a
  // CoG at (0*100 + 11*(-95))/5 = -209 px, far outside [-0.5, 11.5].
  auto s = settings(PixelFormat::kF32);
  s.min_flux_adu = 0.0;
  s.min_snr = 0.0;
  const std::size_t stride = s.camera.width_px * 4;
  auto frame = make_frame(s, offsets_for(s.grid), 1e4, 0.0, stride);
  // Subaperture 0 covers columns 2..13 and rows 3..14: clear it, then paint.
  auto put = [&](int x, int y, float v) { std::memcpy(frame.data() + y * stride + x * 4, &v, 4); };
  for (int y = 3; y < 15; ++y)
    for (int x = 2; x < 14; ++x) put(x, y, 0.0f);
  put(2, 8, 100.0f);
  put(13, 8, -95.0f);
  core::Pipeline p(s);
  auto m = p.make_measurement();
  p.measure(view(frame, s, stride), m);
  // The -95 pixel is also far below the background and deeper than the
  // box's flux of 5: the box's light cancels, a reason of its own.
  CHECK(m.flags[0] == (core::kFlagOutsideBox | core::kFlagNegativePixel));
  CHECK(m.slope_x_px[0] == 0.0f);
  CHECK(m.n_valid == 11);
}

TEST_CASE("a configured saturation level flags the boxes that reach it", "[pipeline]") {
  // A 12-bit camera in 16-bit words saturates at 4095, not 65535.
  auto s = settings(PixelFormat::kU16);
  s.saturation_adu = 4095.0;
  const std::size_t stride = s.camera.width_px * 2;
  auto frame = make_frame(s, offsets_for(s.grid), 2e4, 10.0, stride);
  const std::uint16_t full = 4095;
  std::memcpy(frame.data() + 20 * stride + 30 * 2, &full, 2);  // (30, 20): ix 2, iy 1 -> index 6
  core::Pipeline p(s);
  auto m = p.make_measurement();
  p.measure(view(frame, s, stride), m);
  CHECK(m.flags[6] == core::kFlagSaturated);
  CHECK(m.n_saturated == 1);
  CHECK(m.n_valid == 11);
  CHECK(m.health == core::kHealthSaturated);
  SECTION("the default is the pixel type's full scale") {
    auto d = settings(PixelFormat::kU16);
    core::Pipeline q(d);
    auto n = q.make_measurement();
    q.measure(view(frame, d, stride), n);
    CHECK(n.n_saturated == 0);
    CHECK(n.health == core::kHealthOk);
  }
}

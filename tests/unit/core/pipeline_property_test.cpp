// No number without trust: thousands of random frames (random content, from
// photon-like spots to adversarial f32 values; random geometry within the
// limits; random settings and centroiders) through the pipeline. Every
// published value must be finite, and every subaperture published valid
// must carry a centroid inside its box, positive flux and the significance
// its settings ask for. The generator is seeded: a failure names its round.
#include <catch2/catch.hpp>

#include <cfloat>
#include <cmath>
#include <cstring>
#include <random>

#include "daemon/core/centroid/make_centroider.h"
#include "daemon/core/pipeline/pipeline.h"

using namespace slopecast;

namespace {

struct Case {
  core::PipelineSettings settings;
  std::vector<std::byte> frame;
};

float adversarial(std::mt19937_64& rng) {
  switch (rng() % 8) {
    case 0: return 0.0f;
    case 1: return -1e7f;
    case 2: return 1e7f;
    case 3: return 3e37f;
    case 4: return -3e37f;
    case 5: return FLT_MIN;
    case 6: return 65535.0f;
    default: return std::uniform_real_distribution<float>(-100.0f, 100.0f)(rng);
  }
}

Case make_case(std::mt19937_64& rng) {
  Case c;
  auto& s = c.settings;
  const core::PixelFormat formats[] = {core::PixelFormat::kU8, core::PixelFormat::kU16, core::PixelFormat::kU32,
                                       core::PixelFormat::kF32};
  const auto format = formats[rng() % 4];
  const int pitch = 2 + static_cast<int>(rng() % 14), nx = 1 + static_cast<int>(rng() % 4),
            ny = 1 + static_cast<int>(rng() % 4);
  const int margin = static_cast<int>(rng() % 3);
  s.camera = {nx * pitch + margin, ny * pitch + margin, format};
  s.grid = {nx, ny, pitch, margin, static_cast<int>(rng() % (margin + 1))};
  s.background = pitch >= core::kMinPitchForBorderBackground && rng() % 3
                     ? (rng() % 2 ? core::BackgroundMode::kBorder : core::BackgroundMode::kBorderMedian)
                     : core::BackgroundMode::kNone;
  s.min_snr = (rng() % 2) ? 5.0 : 0.0;
  s.min_flux_adu = (rng() % 2) ? 0.0 : 50.0;
  const core::CentroiderKind kinds[] = {core::CentroiderKind::kCog,         core::CentroiderKind::kThresholded,
                                        core::CentroiderKind::kWeighted,    core::CentroiderKind::kBrightest,
                                        core::CentroiderKind::kCorrelation, core::CentroiderKind::kQuadCell,
                                        core::CentroiderKind::kGaussianFit};
  s.centroider.kind = kinds[rng() % 7];
  s.centroider.search_px = std::max(1, pitch / 3);
  s.centroider.brightest_pixels = std::max(1, std::min(5, pitch * pitch - 1));
  if (!core::validate(s).empty()) s.centroider.kind = core::CentroiderKind::kCog;
  const std::size_t n = static_cast<std::size_t>(s.camera.width_px) * s.camera.height_px;
  if (rng() % 4 == 0) {
    s.dark_adu.resize(n);
    for (auto& d : s.dark_adu) d = static_cast<float>(rng() % 20);
  }
  const std::size_t bpp = core::bytes_per_pixel(format);
  c.frame.resize(n * bpp);
  const int content = static_cast<int>(rng() % 4);
  std::normal_distribution<double> noise(100.0, 5.0);
  for (std::size_t k = 0; k < n; ++k) {
    const int x = static_cast<int>(k % s.camera.width_px), y = static_cast<int>(k / s.camera.width_px);
    double v = 0.0;
    if (content == 0) v = noise(rng);                                              // background only
    else if (content == 1) v = noise(rng) + ((x % pitch == pitch / 2 && y % pitch == pitch / 2) ? 5000 : 0);
    else if (content == 2) v = static_cast<double>(rng() % 70000);                 // anything
    else v = adversarial(rng);                                                     // extremes (f32 sees them all)
    switch (format) {
      case core::PixelFormat::kU8: { auto q = static_cast<std::uint8_t>(std::clamp(v, 0.0, 255.0)); std::memcpy(&c.frame[k], &q, 1); break; }
      case core::PixelFormat::kU16: { auto q = static_cast<std::uint16_t>(std::clamp(v, 0.0, 65535.0)); std::memcpy(&c.frame[k * 2], &q, 2); break; }
      case core::PixelFormat::kU32: { auto q = static_cast<std::uint32_t>(std::clamp(v, 0.0, 4e9)); std::memcpy(&c.frame[k * 4], &q, 4); break; }
      case core::PixelFormat::kF32: { auto q = static_cast<float>(v); if (rng() % 200 == 0) q = NAN; std::memcpy(&c.frame[k * 4], &q, 4); break; }
    }
  }
  return c;
}

}  // namespace

TEST_CASE("every published value is finite and every valid subaperture is trustworthy, on random frames",
          "[pipeline][property]") {
  std::mt19937_64 rng(20261202);
  int valid_seen = 0;
  for (int round = 0; round < 20000; ++round) {
    Case c = make_case(rng);
    const auto& s = c.settings;
    INFO("round " << round << ": " << core::pixel_format_name(s.camera.format) << " " << s.grid.n_subap_x << "x"
                  << s.grid.n_subap_y << " of " << s.grid.pitch_px << " px, " << core::centroider_name(s.centroider.kind)
                  << ", background " << core::background_mode_name(s.background));
    REQUIRE(core::validate(s).empty());
    core::Pipeline p(s);
    auto m = p.make_measurement();
    p.measure({c.frame, s.camera.width_px, s.camera.height_px,
               static_cast<std::size_t>(s.camera.width_px) * core::bytes_per_pixel(s.camera.format), s.camera.format},
              m);
    const double lo = -0.5, hi = s.grid.pitch_px - 0.5, centre = 0.5 * (s.grid.pitch_px - 1);
    for (int i = 0; i < m.size(); ++i) {
      INFO("subaperture " << i << " flags " << m.flags[i] << " slope " << m.slope_x_px[i] << ", " << m.slope_y_px[i]
                          << " flux " << m.flux_adu[i]);
      for (const auto* v : {&m.slope_x_px, &m.slope_y_px, &m.flux_adu, &m.peak_adu, &m.background_adu, &m.snr,
                            &m.fwhm_x_px, &m.fwhm_y_px, &m.ellipticity, &m.quality})
        REQUIRE(std::isfinite((*v)[i]));
      if (m.flags[i] != core::kFlagNone) {
        REQUIRE(m.slope_x_px[i] == 0.0f);
        REQUIRE(m.slope_y_px[i] == 0.0f);
        continue;
      }
      ++valid_seen;
      REQUIRE(m.slope_x_px[i] + centre >= lo);
      REQUIRE(m.slope_x_px[i] + centre <= hi);
      REQUIRE(m.slope_y_px[i] + centre >= lo);
      REQUIRE(m.slope_y_px[i] + centre <= hi);
      REQUIRE(m.flux_adu[i] > 0.0f);
      REQUIRE(m.flux_adu[i] >= s.min_flux_adu);
      if (s.min_snr > 0.0) REQUIRE(m.snr[i] >= s.min_snr);
    }
    for (float v : {m.slope_rms_x_px, m.slope_rms_y_px, m.mean_flux_adu, m.total_flux_adu, m.median_fwhm_px})
      REQUIRE(std::isfinite(v));
  }
  CHECK(valid_seen > 1000);  // the generator does make trustworthy spots too
}

TEST_CASE("f32 boxes that cancel or overflow are flagged, never published", "[pipeline][hardening]") {
  // Found by an adversarial run: a box whose pixels nearly cancel was
  // published valid with a slope far outside its box, and a box summing
  // beyond FLT_MAX was published valid with flux inf.
  core::PipelineSettings s;
  s.camera = {30, 15, core::PixelFormat::kF32};
  s.grid = {2, 1, 15, 0, 0};
  std::vector<float> px(30 * 15, 10.0f);
  px[7 * 30 + 3] = 1e7f;
  px[7 * 30 + 11] = -1e7f + 64.0f;  // box 0: +1e7 and -1e7 + 64 (their CoG lies ~1e6 px away)
  for (int y = 3; y < 12; ++y)
    for (int x = 18; x < 27; ++x) px[y * 30 + x] = 3e37f;  // box 1: 81 x 3e37 > FLT_MAX
  for (auto kind : {core::CentroiderKind::kCog, core::CentroiderKind::kWeighted, core::CentroiderKind::kGaussianFit}) {
    s.centroider.kind = kind;
    core::Pipeline p(s);
    auto m = p.make_measurement();
    p.measure({std::as_bytes(std::span(px)), 30, 15, 120, core::PixelFormat::kF32}, m);
    INFO(core::centroider_name(kind) << ": flags " << m.flags[0] << ", " << m.flags[1]);
    CHECK(m.flags[0] != core::kFlagNone);
    CHECK(m.slope_x_px[0] == 0.0f);
    CHECK((m.flags[1] & core::kFlagNonFinite) != 0);
    CHECK(m.flux_adu[1] == 0.0f);
    CHECK(std::isfinite(m.total_flux_adu));
    CHECK(m.health & core::kHealthNonFinite);
  }
}

#include "daemon/core/pipeline/pipeline.h"

#include <algorithm>
#include <cassert>
#include <cmath>
#include <limits>

#include <fmt/format.h>

#include "daemon/core/frame/box_correction.h"
#include "daemon/core/centroid/centroid_cog.h"

namespace slopecast::core {

namespace {
std::unique_ptr<Centroider> make_centroider(CentroiderKind kind, int strip_width_px) {
  switch (kind) {
    case CentroiderKind::kCog: return std::make_unique<CogCentroider>(strip_width_px);
  }
  return nullptr;
}
}  // namespace

double full_scale_adu(PixelFormat format) {
  switch (format) {
    case PixelFormat::kU8: return 255.0;
    case PixelFormat::kU16: return 65535.0;
    case PixelFormat::kU32: return 4294967295.0;
    case PixelFormat::kF32: return std::numeric_limits<double>::infinity();
  }
  return std::numeric_limits<double>::infinity();
}

std::string validate(const PipelineSettings& s) {
  if (auto e = validate(s.camera); !e.empty()) return e;
  if (auto e = validate(s.grid, s.camera); !e.empty()) return e;
  const std::size_t pixels = static_cast<std::size_t>(s.camera.width_px) * s.camera.height_px;
  if (!s.dark_adu.empty() && s.dark_adu.size() != pixels)
    return fmt::format("dark frame has {} pixels, the camera has {} ({} x {})", s.dark_adu.size(),
                       pixels, s.camera.width_px, s.camera.height_px);
  for (float v : s.dark_adu)
    if (!std::isfinite(v)) return "dark frame contains a NaN or infinite pixel";
  if (!std::isfinite(s.min_flux_adu) || s.min_flux_adu < 0.0)
    return fmt::format("min_flux_adu must be a finite number >= 0, got {}", s.min_flux_adu);
  if (!std::isfinite(s.min_snr) || s.min_snr < 0.0)
    return fmt::format("min_snr must be a finite number >= 0, got {}", s.min_snr);
  if (!(s.min_valid_fraction >= 0.0 && s.min_valid_fraction <= 1.0))
    return fmt::format("min_valid_fraction must be 0..1, got {}", s.min_valid_fraction);
  if (s.saturation_adu && !(*s.saturation_adu > 0.0))
    return fmt::format("saturation_adu must be > 0, got {}", *s.saturation_adu);
  if (s.background == BackgroundMode::kBorder && s.grid.pitch_px < kMinPitchForBorderBackground)
    return fmt::format(
        "background = \"border\" needs pitch_px >= {} so that the spot has room inside the "
        "border ring; pitch_px is {} (use background = \"none\" with a dark frame)",
        kMinPitchForBorderBackground, s.grid.pitch_px);
  return {};
}

Pipeline::Pipeline(PipelineSettings settings)
    : settings_(std::move(settings)),
      centroider_(make_centroider(settings_.centroider, settings_.grid.n_subap_x * settings_.grid.pitch_px)),
      strip_(static_cast<std::size_t>(settings_.grid.pitch_px) * settings_.grid.n_subap_x * settings_.grid.pitch_px),
      column_max_(static_cast<std::size_t>(settings_.grid.n_subap_x) * settings_.grid.pitch_px),
      border_(2 * static_cast<std::size_t>(border_pixel_count(settings_.grid.pitch_px, settings_.grid.pitch_px))),
      borders_(static_cast<std::size_t>(settings_.grid.count())),
      estimates_(static_cast<std::size_t>(settings_.grid.count())),
      raw_max_(static_cast<std::size_t>(settings_.grid.count())),
      sigmas_(static_cast<std::size_t>(settings_.grid.count())),
      saturation_adu_(static_cast<float>(settings_.saturation_adu.value_or(full_scale_adu(settings_.camera.format)))) {
  assert(validate(settings_).empty());
}

FrameMeasurement Pipeline::make_measurement() const {
  FrameMeasurement m;
  m.resize(settings_.grid.count());
  return m;
}

void Pipeline::measure(const ImageView& image, FrameMeasurement& out) {
  const LensletGrid& g = settings_.grid;
  const PipelineSettings& s = settings_;
  assert(out.size() == g.count());
  const int p = g.pitch_px;
  const int strip_width = g.n_subap_x * p;
  const bool subtract = s.background == BackgroundMode::kBorder;
  const bool check_saturation = std::isfinite(saturation_adu_);
  const StripView strip{strip_.data(), p, p, g.n_subap_x, strip_width};

  // Pass 1: every pixel once.
  for (int iy = 0; iy < g.n_subap_y; ++iy) {
    const int row0 = iy * g.n_subap_x;
    correct_box(image, s.dark_adu, Box{g.origin_x_px, g.box_y0(iy), strip_width, p}, strip_,
                check_saturation ? std::span<float>(column_max_) : std::span<float>());
    for (int ix = 0; ix < g.n_subap_x; ++ix) {
      BorderStats& b = borders_[row0 + ix];
      b = border_stats(strip.window(ix), border_);
      if (subtract && b.finite) subtract_constant(strip_.data() + ix * p, p, p, strip_width, b.level_adu);
      if (check_saturation) {
        const float* cm = column_max_.data() + ix * p;
        raw_max_[row0 + ix] = *std::max_element(cm, cm + p);
      }
    }
    centroider_->measure_strip(strip, std::span<SpotEstimate>(estimates_).subspan(row0, g.n_subap_x));
  }
  decide(out);
}

void Pipeline::decide(FrameMeasurement& out) {
  const LensletGrid& g = settings_.grid;
  const PipelineSettings& s = settings_;
  const int p = g.pitch_px;
  const double centre = 0.5 * (p - 1);             // box centre, window-local px
  const double edge_lo = -0.5, edge_hi = p - 0.5;  // box edges, window-local px
  const int n_pixels = p * p;
  const bool subtract = s.background == BackgroundMode::kBorder;
  const bool check_saturation = std::isfinite(saturation_adu_);

  // A ring of ~56 pixels gives each box's noise to ~10 %; where it happens
  // to read low, an empty box's significance is inflated (measured on bias +
  // read noise + background light: 38 of 102 400 empty boxes above 4 and 7
  // above 5, against 3.2 and 0.03 for a Gaussian). The frame's median of the
  // boxes' noise is a floor under each box's own figure; a box on a locally
  // brighter background keeps its larger one.
  int n_sigmas = 0;
  for (const BorderStats& b : borders_)
    if (b.finite) sigmas_[n_sigmas++] = b.sigma_adu;
  float frame_sigma = 0.0f;
  if (n_sigmas > 0) {
    std::nth_element(sigmas_.begin(), sigmas_.begin() + n_sigmas / 2, sigmas_.begin() + n_sigmas);
    frame_sigma = sigmas_[n_sigmas / 2];
  }

  double sum_x2 = 0.0, sum_y2 = 0.0, sum_flux = 0.0;
  int n_valid = 0, n_saturated = 0, n_lit = 0;
  bool any_non_finite = false;
  for (int i = 0; i < g.count(); ++i) {
    const SpotEstimate& e = estimates_[i];
    const BorderStats& b = borders_[i];
    // A non-finite pixel (possible in f32 frames) must not leak NaN onto
    // the wire: the flag says why, the numbers become 0.
    const bool finite = std::isfinite(e.flux) && std::isfinite(e.peak) && b.finite;
    const double snr =
        finite ? flux_snr(e.flux, std::max(b.sigma_adu, frame_sigma), n_pixels, b.n_kept, subtract) : 0.0;
    out.flux_adu[i] = finite ? static_cast<float>(e.flux) : 0.0f;
    out.peak_adu[i] = finite ? static_cast<float>(e.peak) : 0.0f;
    out.background_adu[i] = finite && subtract ? b.level_adu : 0.0f;
    out.snr[i] = static_cast<float>(std::min(snr, 1e9));
    std::uint32_t flags = kFlagNone;
    if (!finite || (e.flux > 0.0 && !e.located)) flags |= kFlagNonFinite;
    if (finite && !(e.flux >= s.min_flux_adu && e.flux > 0.0)) flags |= kFlagLowFlux;
    if (finite && s.min_snr > 0.0 && snr < s.min_snr) flags |= kFlagLowSnr;
    if (e.located && (e.x < edge_lo || e.x > edge_hi || e.y < edge_lo || e.y > edge_hi))
      flags |= kFlagOutsideBox;
    if (check_saturation && raw_max_[i] >= saturation_adu_) flags |= kFlagSaturated;
    out.flags[i] = flags;
    any_non_finite |= !finite;
    if (flags & kFlagSaturated) ++n_saturated;
    if (!(flags & (kFlagLowFlux | kFlagLowSnr | kFlagNonFinite))) ++n_lit;
    if (flags != kFlagNone) {
      out.slope_x_px[i] = 0.0f;
      out.slope_y_px[i] = 0.0f;
      continue;
    }
    const double sx = e.x - centre, sy = e.y - centre;
    out.slope_x_px[i] = static_cast<float>(sx);
    out.slope_y_px[i] = static_cast<float>(sy);
    sum_x2 += sx * sx;
    sum_y2 += sy * sy;
    sum_flux += e.flux;
    ++n_valid;
  }
  out.n_valid = n_valid;
  out.n_saturated = n_saturated;
  out.slope_rms_x_px = n_valid ? static_cast<float>(std::sqrt(sum_x2 / n_valid)) : 0.0f;
  out.slope_rms_y_px = n_valid ? static_cast<float>(std::sqrt(sum_y2 / n_valid)) : 0.0f;
  out.mean_flux_adu = n_valid ? static_cast<float>(sum_flux / n_valid) : 0.0f;
  std::uint32_t health = kHealthOk;
  if (n_saturated > 0) health |= kHealthSaturated;
  if (n_lit == 0) health |= kHealthNoLight;
  if (n_valid < s.min_valid_fraction * g.count()) health |= kHealthFewValid;
  if (any_non_finite) health |= kHealthNonFinite;
  out.health = health;
}

}  // namespace slopecast::core

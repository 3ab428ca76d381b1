#include "daemon/core/pipeline.h"

#include <cassert>
#include <cmath>

#include <fmt/format.h>

#include "daemon/core/centroid_cog.h"
#include "daemon/core/box_correction.h"

namespace slopecast::core {

namespace {
std::unique_ptr<Centroider> make_centroider(CentroiderKind kind, int strip_width_px) {
  switch (kind) {
    case CentroiderKind::kCog: return std::make_unique<CogCentroider>(strip_width_px);
  }
  return nullptr;
}
}  // namespace

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
  return {};
}

Pipeline::Pipeline(PipelineSettings settings)
    : settings_(std::move(settings)),
      centroider_(make_centroider(settings_.centroider, settings_.grid.n_subap_x * settings_.grid.pitch_px)),
      strip_(static_cast<std::size_t>(settings_.grid.pitch_px) * settings_.grid.n_subap_x * settings_.grid.pitch_px),
      estimates_(static_cast<std::size_t>(settings_.grid.n_subap_x)) {
  assert(validate(settings_).empty());
}

FrameMeasurement Pipeline::make_measurement() const {
  FrameMeasurement m;
  m.resize(settings_.grid.count());
  return m;
}

void Pipeline::measure(const ImageView& image, FrameMeasurement& out) {
  const LensletGrid& g = settings_.grid;
  assert(out.size() == g.count());
  const double centre = 0.5 * (g.pitch_px - 1);  // box centre, window-local px
  const int strip_width = g.n_subap_x * g.pitch_px;
  const StripView strip{strip_.data(), g.pitch_px, g.pitch_px, g.n_subap_x, strip_width};
  double sum_x2 = 0.0, sum_y2 = 0.0, sum_flux = 0.0;
  int n_valid = 0;
  for (int iy = 0; iy < g.n_subap_y; ++iy) {
    correct_box(image, settings_.dark_adu, Box{g.origin_x_px, g.box_y0(iy), strip_width, g.pitch_px}, strip_);
    centroider_->measure_strip(strip, estimates_);
    for (int ix = 0; ix < g.n_subap_x; ++ix) {
      const int i = iy * g.n_subap_x + ix;
      const SpotEstimate& e = estimates_[ix];
      // A non-finite pixel (possible in f32 frames) must not leak NaN onto
      // the wire: the flag says why, the numbers become 0.
      const bool finite = std::isfinite(e.flux) && std::isfinite(e.peak);
      out.flux_adu[i] = finite ? static_cast<float>(e.flux) : 0.0f;
      out.peak_adu[i] = finite ? static_cast<float>(e.peak) : 0.0f;
      std::uint32_t flags = kFlagNone;
      if (!finite) flags |= kFlagNonFinite;
      else if (!(e.flux >= settings_.min_flux_adu && e.flux > 0.0)) flags |= kFlagLowFlux;
      else if (!e.located) flags |= kFlagNonFinite;
      out.flags[i] = flags;
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
  }
  out.n_valid = n_valid;
  out.slope_rms_x_px = n_valid ? static_cast<float>(std::sqrt(sum_x2 / n_valid)) : 0.0f;
  out.slope_rms_y_px = n_valid ? static_cast<float>(std::sqrt(sum_y2 / n_valid)) : 0.0f;
  out.mean_flux_adu = n_valid ? static_cast<float>(sum_flux / n_valid) : 0.0f;
}

}  // namespace slopecast::core

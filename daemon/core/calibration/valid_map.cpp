#include "daemon/core/calibration/valid_map.h"

#include <algorithm>
#include <cmath>

#include <fmt/format.h>

namespace slopecast::core {

std::string validate_flux_fraction(double f) {
  if (!(f > 0.0 && f <= 1.0)) return fmt::format("the flux fraction must be 0 < f <= 1, got {}", f);
  return {};
}

std::vector<std::uint8_t> valid_from_flux(std::span<const float> mean_flux, double fraction) {
  std::vector<float> lit;
  for (float f : mean_flux)
    if (f > 0.0f && std::isfinite(f)) lit.push_back(f);
  std::vector<std::uint8_t> map(mean_flux.size(), 0);
  if (lit.empty()) return map;
  std::nth_element(lit.begin(), lit.begin() + static_cast<std::ptrdiff_t>(lit.size() / 2), lit.end());
  const double limit = fraction * lit[lit.size() / 2];
  for (std::size_t i = 0; i < mean_flux.size(); ++i)
    map[i] = std::isfinite(mean_flux[i]) && mean_flux[i] > 0.0f && mean_flux[i] >= limit;
  return map;
}

std::string validate(const PupilSpec& p) {
  if (!std::isfinite(p.centre_x_px) || !std::isfinite(p.centre_y_px))
    return "the pupil centre must be finite";
  if (!(p.diameter_px > 0.0) || !std::isfinite(p.diameter_px))
    return fmt::format("the pupil diameter must be a finite number > 0 px, got {}", p.diameter_px);
  if (!(p.obstruction >= 0.0 && p.obstruction < 1.0))
    return fmt::format("the central obstruction is a fraction of the diameter, 0 <= f < 1, got {}", p.obstruction);
  return {};
}

std::vector<std::uint8_t> valid_from_pupil(const std::vector<SubapertureBox>& boxes, const PupilSpec& p,
                                           double min_area_fraction) {
  constexpr int kSamples = 16;
  const double r_out = 0.5 * p.diameter_px, r_in = r_out * p.obstruction;
  std::vector<std::uint8_t> map(boxes.size(), 0);
  for (std::size_t i = 0; i < boxes.size(); ++i) {
    const SubapertureBox& b = boxes[i];
    int inside = 0;
    for (int a = 0; a < kSamples; ++a)
      for (int c = 0; c < kSamples; ++c) {
        // The box covers [x0 - 1/2, x0 + width - 1/2] in frame coordinates.
        const double x = b.x0 - 0.5 + b.width * (a + 0.5) / kSamples - p.centre_x_px;
        const double y = b.y0 - 0.5 + b.height * (c + 0.5) / kSamples - p.centre_y_px;
        const double r = std::hypot(x, y);
        inside += r <= r_out && r >= r_in;
      }
    map[i] = inside >= min_area_fraction * kSamples * kSamples;
  }
  return map;
}

std::vector<std::uint8_t> combine_maps(std::span<const std::uint8_t> a, std::span<const std::uint8_t> b) {
  if (a.empty()) return {b.begin(), b.end()};
  if (b.empty()) return {a.begin(), a.end()};
  std::vector<std::uint8_t> out(std::min(a.size(), b.size()));
  for (std::size_t i = 0; i < out.size(); ++i) out[i] = a[i] && b[i];
  return out;
}

}  // namespace slopecast::core

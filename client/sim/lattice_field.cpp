#include "client/sim/lattice_field.h"

#include <algorithm>
#include <cmath>
#include <numbers>

#include <fmt/format.h>

#include "client/sim/spot_image.h"

namespace slopecast::sim {

std::string validate(const LatticeFieldSettings& s) {
  if (s.width_px < 8 || s.height_px < 8 || s.width_px > 16384 || s.height_px > 16384)
    return fmt::format("the frame must be 8..16384 px each way, got {} x {}", s.width_px, s.height_px);
  if (s.lenslets_x < 1 || s.lenslets_y < 1 || s.lenslets_x > 4096 || s.lenslets_y > 4096)
    return fmt::format("lenslets must be 1..4096 each way, got {} x {}", s.lenslets_x, s.lenslets_y);
  if (!(s.pitch_px >= 3.0)) return fmt::format("pitch_px must be >= 3, got {}", s.pitch_px);
  if (!(std::abs(s.rotation_deg) <= 45.0)) return fmt::format("rotation_deg must be within +-45, got {}", s.rotation_deg);
  if (!(s.pupil_diameter_px > 0.0)) return "pupil_diameter_px must be > 0";
  if (!(s.obstruction >= 0.0 && s.obstruction < 1.0)) return "obstruction must be 0 <= obstruction < 1";
  if (!(s.spot_sigma_px > 0.0)) return "spot_sigma_px must be > 0";
  if (!(s.photons_per_spot >= 0.0) || !(s.background_e >= 0.0) || !(s.bright_factor >= 0.0))
    return "photons_per_spot, background_e and bright_factor must be >= 0";
  for (double v : {s.origin_x_px, s.origin_y_px, s.pupil_x_px, s.pupil_y_px, s.tilt_x_px, s.tilt_y_px})
    if (!std::isfinite(v)) return "positions and tilts must be finite";
  return {};
}

namespace {
// Fraction of the square of side `side` centred on (cx, cy) inside the annulus.
double lit_fraction(const LatticeFieldSettings& s, double cx, double cy, double side) {
  constexpr int kSamples = 16;
  const double r_out = 0.5 * s.pupil_diameter_px, r_in = r_out * s.obstruction;
  int inside = 0;
  for (int a = 0; a < kSamples; ++a)
    for (int b = 0; b < kSamples; ++b) {
      const double x = cx + side * ((a + 0.5) / kSamples - 0.5) - s.pupil_x_px;
      const double y = cy + side * ((b + 0.5) / kSamples - 0.5) - s.pupil_y_px;
      const double r = std::hypot(x, y);
      inside += r <= r_out && r >= r_in;
    }
  return static_cast<double>(inside) / (kSamples * kSamples);
}
}  // namespace

LatticeField render_lattice_field(const LatticeFieldSettings& s) {
  LatticeField out;
  out.image_e.assign(static_cast<std::size_t>(s.width_px) * s.height_px, s.background_e);
  const double t = s.rotation_deg * std::numbers::pi / 180.0;
  const double c = std::cos(t), sn = std::sin(t);
  const auto listed = [](const std::vector<std::pair<int, int>>& v, int i, int j) {
    return std::find(v.begin(), v.end(), std::pair{i, j}) != v.end();
  };
  const int reach = static_cast<int>(std::ceil(6.0 * s.spot_sigma_px));
  for (int j = 0; j < s.lenslets_y; ++j)
    for (int i = 0; i < s.lenslets_x; ++i) {
      const double lx = s.origin_x_px + s.pitch_px * (i * c - j * sn);
      const double ly = s.origin_y_px + s.pitch_px * (i * sn + j * c);
      const double f = lit_fraction(s, lx, ly, s.pitch_px);
      if (f < 0.05 || listed(s.dead, i, j)) continue;
      const double x = lx + s.tilt_x_px, y = ly + s.tilt_y_px;
      const double photons = s.photons_per_spot * f * (listed(s.bright, i, j) ? s.bright_factor : 1.0);
      const int x_lo = std::max(0, static_cast<int>(std::floor(x)) - reach);
      const int y_lo = std::max(0, static_cast<int>(std::floor(y)) - reach);
      const int x_hi = std::min(s.width_px, static_cast<int>(std::floor(x)) + reach + 1);
      const int y_hi = std::min(s.height_px, static_cast<int>(std::floor(y)) + reach + 1);
      if (x_lo >= x_hi || y_lo >= y_hi) continue;
      add_gaussian_spot(out.image_e, s.width_px, x, y, s.spot_sigma_px, photons, ClipRect{x_lo, y_lo, x_hi, y_hi});
      out.spots.push_back({i, j, x, y, photons});
    }
  return out;
}

}  // namespace slopecast::sim

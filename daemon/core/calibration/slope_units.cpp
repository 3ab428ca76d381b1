#include "daemon/core/calibration/slope_units.h"

#include <cmath>

#include <fmt/format.h>

namespace slopecast::core {

std::string_view slope_unit_name(SlopeUnit u) {
  switch (u) {
    case SlopeUnit::kPx: return "px";
    case SlopeUnit::kRad: return "rad";
    case SlopeUnit::kNm: return "nm";
    case SlopeUnit::kArcsec: return "arcsec";
  }
  return "?";
}

namespace {
std::string need(std::string_view unit, std::string_view key, double v) {
  if (v > 0.0 && std::isfinite(v)) return {};
  return fmt::format("slopes in {} need {} > 0 (got {})", unit, key, v);
}
}  // namespace

std::variant<double, std::string> units_per_px(SlopeUnit unit, const SlopeOptics& o) {
  switch (unit) {
    case SlopeUnit::kPx: return 1.0;
    case SlopeUnit::kArcsec:
      if (auto e = need("arcsec", "plate_scale_arcsec_per_px", o.plate_scale_arcsec_per_px); !e.empty()) return e;
      return o.plate_scale_arcsec_per_px;
    case SlopeUnit::kRad:
    case SlopeUnit::kNm: {
      const auto name = slope_unit_name(unit);
      if (auto e = need(name, "pixel_size_um", o.pixel_size_um); !e.empty()) return e;
      if (auto e = need(name, "lenslet_focal_length_mm", o.lenslet_focal_length_mm); !e.empty()) return e;
      const double rad = (o.pixel_size_um * 1e-6) / (o.lenslet_focal_length_mm * 1e-3);
      if (unit == SlopeUnit::kRad) return rad;
      if (auto e = need(name, "lenslet_pitch_um", o.lenslet_pitch_um); !e.empty()) return e;
      return rad * (o.lenslet_pitch_um * 1e-6) * 1e9;
    }
  }
  return std::string("unknown slope unit");
}

}  // namespace slopecast::core

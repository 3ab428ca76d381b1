#include "daemon/core/centroid/centroid_noise.h"

#include <cmath>
#include <limits>
#include <numbers>

namespace slopecast::core {

bool has_noise_model(CentroiderKind kind) {
  return kind == CentroiderKind::kCog || kind == CentroiderKind::kWeighted;
}

double centroid_noise_variance(const CentroiderSettings& method, const SpotNoiseInputs& in) {
  const double nan = std::numeric_limits<double>::quiet_NaN();
  if (!(in.photons_e > 0)) return nan;
  const double n = in.photons_e;
  const double pixel_noise = in.read_noise_e * in.read_noise_e + std::max(0.0, in.background_e_per_px);
  const double s2 = in.spot_sigma_px * in.spot_sigma_px + 1.0 / 12.0;
  switch (method.kind) {
    case CentroiderKind::kCog: {
      const double box2 = static_cast<double>(in.box_px) * in.box_px;
      return s2 / n + pixel_noise * box2 * (box2 - 1) / 12.0 / (n * n);
    }
    case CentroiderKind::kWeighted: {
      const double w2 = method.weight_sigma_px * method.weight_sigma_px;
      const double g4 = std::pow(s2 + w2, 4);
      return (s2 / n) * g4 / (w2 * w2 * (2 * s2 + w2) * (2 * s2 + w2)) +
             std::numbers::pi * pixel_noise * g4 / (2 * n * n * w2 * w2);
    }
    default:
      return nan;
  }
}

}  // namespace slopecast::core

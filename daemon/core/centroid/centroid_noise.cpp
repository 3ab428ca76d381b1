#include "daemon/core/centroid/centroid_noise.h"

#include <cmath>
#include <limits>
#include <numbers>
#include <vector>

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

double cramer_rao_variance(const SpotNoiseInputs& in, int phases) {
  if (!(in.photons_e > 0) || in.box_px < 1 || !(in.spot_sigma_px > 0)) return std::numeric_limits<double>::quiet_NaN();
  const int n = in.box_px;
  const double s = in.spot_sigma_px;
  const double c = 0.5 * n;  // the box's centre, pixel edges at 0, 1, ..., n
  const double floor_var = std::max(0.0, in.background_e_per_px) + in.read_noise_e * in.read_noise_e;
  const auto cdf = [s](double t) { return 0.5 * std::erfc(-t / (s * std::numbers::sqrt2)); };
  const auto pdf = [s](double t) { return std::exp(-0.5 * t * t / (s * s)) / (s * std::sqrt(2 * std::numbers::pi)); };
  std::vector<double> fx(n), dfx(n), fy(n);
  for (int j = 0; j < n; ++j) fy[j] = cdf(j + 1 - c) - cdf(j - c);
  double sum = 0;
  const int m = std::max(1, phases);
  for (int p = 0; p < m; ++p) {
    const double x0 = c + static_cast<double>(p) / m;
    for (int i = 0; i < n; ++i) {
      fx[i] = cdf(i + 1 - x0) - cdf(i - x0);
      dfx[i] = pdf(i - x0) - pdf(i + 1 - x0);  // d fx / d x0
    }
    double fisher = 0;
    for (int j = 0; j < n; ++j)
      for (int i = 0; i < n; ++i) {
        const double mu = in.photons_e * fx[i] * fy[j];
        const double d = in.photons_e * dfx[i] * fy[j];
        const double var = mu + floor_var;
        if (var > 0) fisher += d * d / var;
      }
    sum += 1.0 / fisher;
  }
  return sum / m;
}

}  // namespace slopecast::core

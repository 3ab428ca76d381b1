#include "daemon/core/centroid/centroid_weighted.h"

#include <cmath>

namespace slopecast::core {

WeightedCentroider::WeightedCentroider(const CentroiderSettings& s, int max_side)
    : sigma_w_(s.weight_sigma_px),
      gain_((s.spot_sigma_px * s.spot_sigma_px + 1.0 / 12.0 + s.weight_sigma_px * s.weight_sigma_px) /
            (s.weight_sigma_px * s.weight_sigma_px)),
      follow_(s.weight_follows_spot),
      iterations_(s.weight_iterations),
      tolerance_(s.weight_tolerance_px),
      wx_(static_cast<std::size_t>(max_side)),
      wy_(static_cast<std::size_t>(max_side)) {}

bool WeightedCentroider::weighted_centre(const WindowView& w, double xw, double yw, double& x, double& y) {
  // The weight is separable: W = wx(x) wy(y).
  const double k = -0.5 / (sigma_w_ * sigma_w_);
  for (int i = 0; i < w.width; ++i) wx_[i] = static_cast<float>(std::exp(k * (i - xw) * (i - xw)));
  for (int j = 0; j < w.height; ++j) wy_[j] = static_cast<float>(std::exp(k * (j - yw) * (j - yw)));
  double s = 0.0, sx = 0.0, sy = 0.0;
  for (int j = 0; j < w.height; ++j) {
    const float* row = w.data + static_cast<std::size_t>(j) * w.stride;
    float rs = 0.0f, rx = 0.0f;
    for (int i = 0; i < w.width; ++i) {
      const float v = wx_[i] * row[i];
      rs += v;
      rx += static_cast<float>(i) * v;
    }
    s += wy_[j] * static_cast<double>(rs);
    sx += wy_[j] * static_cast<double>(rx);
    sy += wy_[j] * static_cast<double>(j) * rs;
  }
  if (!(s > 0.0)) return false;
  x = sx / s;
  y = sy / s;
  return std::isfinite(x) && std::isfinite(y);
}

SpotEstimate WeightedCentroider::measure(const WindowView& w, const WindowContext& c) {
  SpotEstimate e;
  if (!std::isfinite(c.moments.flux)) return e;
  double xw = 0.5 * (w.width - 1), yw = 0.5 * (w.height - 1);  // the zero point
  const int rounds = follow_ ? iterations_ : 1;
  bool converged = !follow_;
  for (int r = 0; r < rounds; ++r) {
    double rx = 0.0, ry = 0.0;
    if (!weighted_centre(w, xw, yw, rx, ry)) return SpotEstimate{};
    const double nx = xw + gain_ * (rx - xw), ny = yw + gain_ * (ry - yw);
    e.x = nx;
    e.y = ny;
    e.located = true;
    if (!follow_) break;
    const bool small = std::abs(nx - xw) < tolerance_ && std::abs(ny - yw) < tolerance_;
    // A weight that has wandered off the window sees only noise.
    if (nx < -0.5 || ny < -0.5 || nx > w.width - 0.5 || ny > w.height - 0.5) break;
    xw = nx;
    yw = ny;
    if (small) {
      converged = true;
      break;
    }
  }
  e.failed = !converged;
  return e;
}

}  // namespace slopecast::core

#include "daemon/core/centroid/centroid_quad_cell.h"

#include <algorithm>
#include <cmath>

namespace slopecast::core {

double erfinv(double s) {
  if (!(s > -1.0 && s < 1.0)) return s > 0.0 ? HUGE_VAL : -HUGE_VAL;
  // First guess: Winitzki's approximation (a = 0.147), good to ~1e-3.
  const double a = 0.147, l = std::log(1.0 - s * s), t = 2.0 / (M_PI * a) + 0.5 * l;
  double y = std::copysign(std::sqrt(std::sqrt(t * t - l / a) - t), s);
  for (int i = 0; i < 4; ++i) {
    const double err = std::erf(y) - s;
    y -= err / (2.0 / std::sqrt(M_PI) * std::exp(-y * y));
  }
  return y;
}

SpotEstimate QuadCellCentroider::measure(const WindowView& w, const WindowContext& c) {
  SpotEstimate e;
  if (!std::isfinite(c.moments.flux)) return e;
  // Weight of each column in the right half: 0, 1, or 1/2 for the middle
  // column of an odd side; likewise rows in the bottom half.
  auto right_share = [](int i, int n) { return 2 * i + 1 == n ? 0.5 : (2 * i >= n ? 1.0 : 0.0); };
  double left = 0.0, right = 0.0, top = 0.0, bottom = 0.0;
  for (int y = 0; y < w.height; ++y) {
    const float* row = w.data + static_cast<std::size_t>(y) * w.stride;
    double row_sum = 0.0;
    for (int x = 0; x < w.width; ++x) {
      const double r = right_share(x, w.width);
      right += r * row[x];
      left += (1.0 - r) * row[x];
      row_sum += row[x];
    }
    const double b = right_share(y, w.height);
    bottom += b * row_sum;
    top += (1.0 - b) * row_sum;
  }
  const double sum_x = left + right, sum_y = top + bottom;
  if (!(sum_x > 0.0) || !(sum_y > 0.0)) return e;
  constexpr double kEdge = 1.0 - 1e-6;
  double sx = (right - left) / sum_x, sy = (bottom - top) / sum_y;
  if (!std::isfinite(sx) || !std::isfinite(sy)) return e;
  if (std::abs(sx) >= kEdge || std::abs(sy) >= kEdge) {
    e.failed = true;
    sx = std::clamp(sx, -kEdge, kEdge);
    sy = std::clamp(sy, -kEdge, kEdge);
  }
  const double k = std::sqrt(2.0) * sigma_;
  e.x = 0.5 * (w.width - 1) + k * erfinv(sx);
  e.y = 0.5 * (w.height - 1) + k * erfinv(sy);
  e.located = true;
  return e;
}

}  // namespace slopecast::core

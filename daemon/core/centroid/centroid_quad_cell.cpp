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

namespace {
// Light right of the window's middle along one axis, from the profile
// (column or row sums) of length n. For odd n the middle pixel m is split
// where a quadratic through pixels m-1, m, m+1 (matching their pixel means)
// puts its light: right part I_m/2 + (I_{m+1} - I_{m-1})/16 (derived: with
// f(u) = a + b u + c u^2, the pixel means are I_k = a + b k + c (k^2 + 1/12),
// and the integral of f over [0, 1/2] is I_0/2 + b/8 with b = (I_1 - I_-1)/2).
// A 1-pixel-wide profile has no split (returns half).
double right_of_middle(const double* profile, int n, double total) {
  if (n == 1) return 0.5 * total;
  double right = 0.0;
  for (int i = (n + 1) / 2; i < n; ++i) right += profile[i];
  if (n % 2 == 1) {
    const int m = n / 2;
    right += 0.5 * profile[m] + (profile[m + 1] - profile[m - 1]) / 16.0;
  }
  return right;
}
}  // namespace

SpotEstimate QuadCellCentroider::measure(const WindowView& w, const WindowContext& c) {
  SpotEstimate e;
  if (!std::isfinite(c.moments.flux) || static_cast<std::size_t>(std::max(w.width, w.height)) > cols_.size()) return e;
  std::fill_n(cols_.begin(), w.width, 0.0);
  double total = 0.0;
  for (int y = 0; y < w.height; ++y) {
    const float* row = w.data + static_cast<std::size_t>(y) * w.stride;
    double row_sum = 0.0;
    for (int x = 0; x < w.width; ++x) {
      cols_[x] += row[x];
      row_sum += row[x];
    }
    rows_[y] = row_sum;
    total += row_sum;
  }
  if (!(total > 0.0)) return e;
  const double right = right_of_middle(cols_.data(), w.width, total);
  const double bottom = right_of_middle(rows_.data(), w.height, total);
  constexpr double kEdge = 1.0 - 1e-6;
  double sx = (2.0 * right - total) / total, sy = (2.0 * bottom - total) / total;
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

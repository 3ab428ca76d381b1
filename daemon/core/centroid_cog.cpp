#include "daemon/core/centroid_cog.h"

#include <algorithm>
#include <cmath>
#include <limits>

namespace slopecast::core {

std::string_view centroider_name(CentroiderKind kind) {
  switch (kind) {
    case CentroiderKind::kCog: return "cog";
  }
  return "?";
}

SpotEstimate CogCentroider::measure(const WindowView& w) const {
  // Row sums in float (a row is at most a few dozen pixels), frame sums in
  // double so that large windows of bright u32 pixels keep their precision.
  double sum = 0.0, sum_x = 0.0, sum_y = 0.0;
  float peak = -std::numeric_limits<float>::infinity();
  for (int y = 0; y < w.height; ++y) {
    const float* row = w.data + static_cast<std::size_t>(y) * w.width;
    float row_sum = 0.0f, row_x = 0.0f, row_peak = row[0];
    for (int x = 0; x < w.width; ++x) {
      row_sum += row[x];
      row_x += static_cast<float>(x) * row[x];
      row_peak = std::max(row_peak, row[x]);
    }
    sum += row_sum;
    sum_x += row_x;
    sum_y += static_cast<double>(y) * row_sum;
    peak = std::max(peak, row_peak);
  }
  SpotEstimate e;
  e.flux = sum;
  e.peak = peak;
  if (!(sum > 0.0)) return e;
  const double x = sum_x / sum, y = sum_y / sum;
  if (!std::isfinite(x) || !std::isfinite(y)) return e;
  e.x = x;
  e.y = y;
  e.located = true;
  return e;
}

}  // namespace slopecast::core

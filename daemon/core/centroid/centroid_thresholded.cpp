#include "daemon/core/centroid/centroid_thresholded.h"

#include <cmath>

namespace slopecast::core {

SpotEstimate ThresholdedCentroider::measure(const WindowView& w, const WindowContext& c) {
  SpotEstimate e;
  if (!std::isfinite(c.moments.flux) || !(c.moments.peak > 0.0)) return e;
  const float t = static_cast<float>(mode_ == ThresholdMode::kRelative ? threshold_ * c.moments.peak : threshold_);
  double s = 0.0, sx = 0.0, sy = 0.0;
  for (int y = 0; y < w.height; ++y) {
    const float* row = w.data + static_cast<std::size_t>(y) * w.stride;
    float rs = 0.0f, rx = 0.0f;
    for (int x = 0; x < w.width; ++x) {
      const float v = row[x] > t ? row[x] - t : 0.0f;
      rs += v;
      rx += static_cast<float>(x) * v;
    }
    s += rs;
    sx += rx;
    sy += static_cast<double>(y) * rs;
  }
  if (!(s > 0.0)) return e;
  e.x = sx / s;
  e.y = sy / s;
  e.located = std::isfinite(e.x) && std::isfinite(e.y);
  if (!e.located) e.x = e.y = 0.0;
  return e;
}

}  // namespace slopecast::core

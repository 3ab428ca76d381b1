#include "daemon/core/centroid/centroid_thresholded.h"

#include <cmath>

namespace slopecast::core {

SpotEstimate ThresholdedCentroider::measure(const WindowView& w, const WindowContext& c) {
  SpotEstimate e;
  if (!std::isfinite(c.moments.flux)) return e;
  float t = static_cast<float>(threshold_);
  if (mode_ == ThresholdMode::kRelative) {
    // The corrected window's peak (the context's peak is the raw one).
    float peak = w.data[0];
    for (int y = 0; y < w.height; ++y) {
      const float* row = w.data + static_cast<std::size_t>(y) * w.stride;
      for (int x = 0; x < w.width; ++x) peak = row[x] > peak ? row[x] : peak;
    }
    if (!(peak > 0.0f)) return e;
    t = static_cast<float>(threshold_) * peak;
  }
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

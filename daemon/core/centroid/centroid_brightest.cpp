#include "daemon/core/centroid/centroid_brightest.h"

#include <algorithm>
#include <cassert>
#include <cmath>
#include <functional>

namespace slopecast::core {

BrightestCentroider::BrightestCentroider(int n_brightest, int max_pixels)
    : n_(n_brightest), scratch_(static_cast<std::size_t>(max_pixels)) {}

SpotEstimate BrightestCentroider::measure(const WindowView& w, const WindowContext& c) {
  SpotEstimate e;
  // A NaN breaks the ordering nth_element needs; the pipeline flags it.
  if (!std::isfinite(c.moments.flux)) return e;
  const int n_pixels = w.width * w.height;
  assert(n_ < n_pixels && static_cast<std::size_t>(n_pixels) <= scratch_.size());
  float* out = scratch_.data();
  for (int y = 0; y < w.height; ++y)
    out = std::copy_n(w.data + static_cast<std::size_t>(y) * w.stride, w.width, out);
  // The (N+1)-th brightest lands at index N.
  std::nth_element(scratch_.begin(), scratch_.begin() + n_, scratch_.begin() + n_pixels, std::greater<float>());
  const float t = scratch_[n_];
  double s = 0.0, sx = 0.0, sy = 0.0;
  for (int y = 0; y < w.height; ++y) {
    const float* row = w.data + static_cast<std::size_t>(y) * w.stride;
    for (int x = 0; x < w.width; ++x) {
      if (!(row[x] > t)) continue;
      const double v = row[x] - t;
      s += v;
      sx += x * v;
      sy += y * v;
    }
  }
  if (!(s > 0.0)) return e;
  e.x = sx / s;
  e.y = sy / s;
  e.located = true;
  return e;
}

}  // namespace slopecast::core

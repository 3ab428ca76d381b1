#include "daemon/core/centroid/centroid_cog.h"

#include <algorithm>
#include <cassert>
#include <cmath>

namespace slopecast::core {

std::string_view centroider_name(CentroiderKind kind) {
  switch (kind) {
    case CentroiderKind::kCog: return "cog";
  }
  return "?";
}

CogCentroider::CogCentroider(int max_width)
    : col_sum_(static_cast<std::size_t>(max_width)),
      col_y_sum_(static_cast<std::size_t>(max_width)),
      col_peak_(static_cast<std::size_t>(max_width)) {}

// Accumulating per column, across rows, makes every update element-wise over
// a row, so the compiler vectorises it without reordering any floating-point
// sum; a per-row horizontal sum is a serial dependency chain. Over a whole
// strip row (e.g. 240 px) the vector loop also amortises its set-up, which a
// 15-px window row does not. Callgrind, 240 x 240 u16 frame, 16 x 16 boxes:
// 1.25 M instructions per frame window by window, 0.48 M strip by strip.
void CogCentroider::accumulate_columns(const float* data, int width, int height, int stride) {
  assert(static_cast<std::size_t>(width) <= col_sum_.size());
  float* __restrict cs = col_sum_.data();
  float* __restrict cys = col_y_sum_.data();
  float* __restrict cp = col_peak_.data();
  for (int x = 0; x < width; ++x) {
    cs[x] = data[x];
    cys[x] = 0.0f;
    cp[x] = data[x];
  }
  for (int y = 1; y < height; ++y) {
    const float* __restrict row = data + static_cast<std::size_t>(y) * stride;
    const float fy = static_cast<float>(y);
    for (int x = 0; x < width; ++x) {
      cs[x] += row[x];
      cys[x] += fy * row[x];
      cp[x] = cp[x] < row[x] ? row[x] : cp[x];
    }
  }
}

SpotEstimate CogCentroider::reduce(int x0, int width) const {
  // Column totals are float (at most a window height of terms each); the
  // short sum over columns runs in double.
  double sum = 0.0, sum_x = 0.0, sum_y = 0.0;
  float peak = col_peak_[x0];
  for (int x = 0; x < width; ++x) {
    const float c = col_sum_[x0 + x];
    sum += c;
    sum_x += static_cast<double>(x) * c;
    sum_y += col_y_sum_[x0 + x];
    peak = std::max(peak, col_peak_[x0 + x]);
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

SpotEstimate CogCentroider::measure(const WindowView& w) {
  accumulate_columns(w.data, w.width, w.height, w.stride);
  return reduce(0, w.width);
}

void CogCentroider::measure_strip(const StripView& strip, std::span<SpotEstimate> out) {
  assert(out.size() >= static_cast<std::size_t>(strip.n_windows));
  accumulate_columns(strip.data, strip.width(), strip.height, strip.stride);
  for (int k = 0; k < strip.n_windows; ++k) out[k] = reduce(k * strip.window_width, strip.window_width);
}

}  // namespace slopecast::core

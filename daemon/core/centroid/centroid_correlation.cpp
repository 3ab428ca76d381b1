#include "daemon/core/centroid/centroid_correlation.h"

#include <cassert>
#include <cmath>

#include "daemon/core/centroid/peak_interpolation.h"

namespace slopecast::core {

CorrelationCentroider::CorrelationCentroider(const CentroiderSettings& s, int p)
    : metric_(s.metric),
      interpolation_(s.interpolation),
      s_(s.search_px),
      t_(p - 2 * s.search_px),
      p_(p),
      template_(static_cast<std::size_t>(t_) * t_),
      map_(static_cast<std::size_t>(2 * s_ + 1) * (2 * s_ + 1)) {
  std::vector<float> ref = s.reference == ReferenceSource::kGaussian ? gaussian_reference(p, s.spot_sigma_px)
                                                                     : s.reference_image;
  double total = 0.0;
  for (float v : ref) total += v;
  double crop = 0.0;
  for (int j = 0; j < t_; ++j)
    for (int i = 0; i < t_; ++i) {
      const double v = ref[static_cast<std::size_t>(j + s_) * p + (i + s_)] / total;
      template_[static_cast<std::size_t>(j) * t_ + i] = static_cast<float>(v);
      crop += v;
    }
  template_sum_ = static_cast<float>(crop);
}

SpotEstimate CorrelationCentroider::measure(const WindowView& w, const WindowContext& c) {
  SpotEstimate e;
  if (!std::isfinite(c.moments.flux) || !(c.moments.flux > 0.0)) return e;
  assert(w.width == p_ && w.height == p_);
  const int n = 2 * s_ + 1;
  const bool maximum = metric_ == CorrelationMetric::kCc;
  double sum = 0.0;
  int best = 0;
  for (int v = 0; v < n; ++v)
    for (int u = 0; u < n; ++u) {
      // Pass 1 over the overlap: sum I (and sum I T for cc).
      float acc_i = 0.0f, acc_it = 0.0f;
      for (int j = 0; j < t_; ++j) {
        const float* live = w.data + static_cast<std::size_t>(j + v) * w.stride + u;
        const float* tp = template_.data() + static_cast<std::size_t>(j) * t_;
        float ri = 0.0f, rit = 0.0f;
        for (int i = 0; i < t_; ++i) {
          ri += live[i];
          rit += live[i] * tp[i];
        }
        acc_i += ri;
        acc_it += rit;
      }
      double value = acc_it;
      if (!maximum) {
        // Pass 2: the difference against the template brought to the
        // overlap's brightness.
        const float k = acc_i / template_sum_;
        float acc = 0.0f;
        for (int j = 0; j < t_; ++j) {
          const float* live = w.data + static_cast<std::size_t>(j + v) * w.stride + u;
          const float* tp = template_.data() + static_cast<std::size_t>(j) * t_;
          float row = 0.0f;
          if (metric_ == CorrelationMetric::kSdf)
            for (int i = 0; i < t_; ++i) row += (live[i] - k * tp[i]) * (live[i] - k * tp[i]);
          else
            for (int i = 0; i < t_; ++i) row += std::abs(live[i] - k * tp[i]);
          acc += row;
        }
        value = acc;
        if (metric_ == CorrelationMetric::kAdfSquared) value *= value;
      }
      const int idx = v * n + u;
      map_[idx] = value;
      sum += value;
      if (maximum ? value > map_[best] : value < map_[best]) best = idx;
    }
  const double ext = map_[best], mean = sum / (n * n);
  if (!std::isfinite(ext) || !std::isfinite(mean)) return e;
  const double scale = std::max(std::abs(ext), std::abs(mean));
  e.quality = scale > 0.0 ? static_cast<float>(std::abs(ext - mean) / scale) : 0.0f;
  const int bu = best % n, bv = best / n;
  auto at = [&](int u, int v) { return map_[static_cast<std::size_t>(v) * n + u]; };
  const bool inner_x = bu > 0 && bu < n - 1, inner_y = bv > 0 && bv < n - 1;
  double dx = 0.0, dy = 0.0;
  if (inner_x && inner_y && interpolation_ == PeakInterpolation::kQuadraticLs) {
    double s3[3][3];
    for (int j = 0; j < 3; ++j)
      for (int i = 0; i < 3; ++i) s3[j][i] = at(bu + i - 1, bv + j - 1);
    const PeakOffset o = quadratic_ls_offset(s3);
    dx = o.dx;
    dy = o.dy;
  } else {
    auto one_d = [&](double m, double z, double p) {
      return interpolation_ == PeakInterpolation::kGaussian ? gaussian_offset(m, z, p) : parabola_offset(m, z, p);
    };
    if (inner_x) dx = one_d(at(bu - 1, bv), at(bu, bv), at(bu + 1, bv));
    if (inner_y) dy = one_d(at(bu, bv - 1), at(bu, bv), at(bu, bv + 1));
  }
  // An interpolated extremum more than a pixel from the integer one means
  // the 3 x 3 samples are not a peak (a saddle, a flat map).
  e.failed = !inner_x || !inner_y || !(std::abs(dx) <= 1.0) || !(std::abs(dy) <= 1.0);
  if (!(std::abs(dx) <= 1.0)) dx = 0.0;
  if (!(std::abs(dy) <= 1.0)) dy = 0.0;
  const double centre = 0.5 * (p_ - 1);
  e.x = centre + (bu - s_) + dx;
  e.y = centre + (bv - s_) + dy;
  e.located = true;
  return e;
}

}  // namespace slopecast::core

#include "daemon/core/metrics/window_moments.h"

#include <algorithm>
#include <cassert>
#include <cmath>
#include <cstdint>

#include "daemon/core/frame/raw_columns.h"

namespace slopecast::core {

SpotShape spot_shape(const WindowMoments& m) {
  SpotShape s;
  if (!m.located) return s;
  constexpr double kPixelVariance = 1.0 / 12.0;
  const double vx = std::max(0.0, m.var_x - kPixelVariance);
  const double vy = std::max(0.0, m.var_y - kPixelVariance);
  s.fwhm_x = kFwhmPerSigma * std::sqrt(vx);
  s.fwhm_y = kFwhmPerSigma * std::sqrt(vy);
  // Eigenvalues of [[vx, c], [c, vy]].
  const double mean = 0.5 * (vx + vy);
  const double half_diff = 0.5 * (vx - vy);
  const double r = std::sqrt(half_diff * half_diff + m.cov_xy * m.cov_xy);
  const double major = mean + r, minor = std::max(0.0, mean - r);
  s.ellipticity = major > 0.0 ? 1.0 - std::sqrt(minor / major) : 0.0;
  return s;
}

FoldedDark fold_dark(std::span<const float> dark, int image_width, int x0, int y0, int w, int h) {
  FoldedDark d;
  if (dark.empty()) return d;
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x) {
      const double v = dark[static_cast<std::size_t>(y0 + y) * image_width + x0 + x];
      d.d00 += v;
      d.d10 += x * v;
      d.d01 += y * v;
      d.d20 += static_cast<double>(x) * x * v;
      d.d02 += static_cast<double>(y) * y * v;
      d.d11 += static_cast<double>(x) * y * v;
    }
  return d;
}

WindowMoments folded_moments(const RawColumns& cols, int x0, int w, int h, const FoldedDark& dark, double level,
                             std::span<const PixelPatch> patches) {
  // Integer sums over the window's columns (exact: each term < 2^32, at
  // most a few hundred of them).
  std::int64_t r00 = 0, r10 = 0, r20 = 0, r01 = 0, r11 = 0, r02 = 0;
  std::uint32_t peak = 0;
  const std::uint32_t* c_s = cols.s + x0;
  const std::uint32_t* c_sy = cols.sy + x0;
  const std::uint32_t* c_syy = cols.syy + x0;
  const std::uint32_t* c_max = cols.max + x0;
  for (int x = 0; x < w; ++x) {
    const std::int64_t xs = static_cast<std::int64_t>(x) * c_s[x];
    r00 += c_s[x];
    r10 += xs;
    r20 += x * xs;
    r01 += c_sy[x];
    r11 += static_cast<std::int64_t>(x) * c_sy[x];
    r02 += c_syy[x];
    peak = peak > c_max[x] ? peak : c_max[x];
  }
  (void)h;
  // The level's sums over the box geometry.
  const double sx = 0.5 * w * (w - 1.0), sy = 0.5 * h * (h - 1.0);
  const double sxx = (w - 1.0) * w * (2.0 * w - 1.0) / 6.0, syy = (h - 1.0) * h * (2.0 * h - 1.0) / 6.0;
  double m00 = static_cast<double>(r00) - dark.d00 - level * w * h;
  double m10 = static_cast<double>(r10) - dark.d10 - level * h * sx;
  double m01 = static_cast<double>(r01) - dark.d01 - level * w * sy;
  double m20 = static_cast<double>(r20) - dark.d20 - level * h * sxx;
  double m02 = static_cast<double>(r02) - dark.d02 - level * w * syy;
  double m11 = static_cast<double>(r11) - dark.d11 - level * sx * sy;
  for (const PixelPatch& q : patches) {
    m00 += q.delta;
    m10 += q.x * q.delta;
    m01 += q.y * q.delta;
    m20 += static_cast<double>(q.x) * q.x * q.delta;
    m02 += static_cast<double>(q.y) * q.y * q.delta;
    m11 += static_cast<double>(q.x) * q.y * q.delta;
  }
  WindowMoments m;
  m.flux = m00;
  m.peak = peak;
  if (!(m00 > 0.0)) return m;
  const double cx = m10 / m00, cy = m01 / m00;
  m.cx = cx;
  m.cy = cy;
  m.var_x = m20 / m00 - cx * cx;
  m.var_y = m02 / m00 - cy * cy;
  m.cov_xy = m11 / m00 - cx * cy;
  m.located = std::isfinite(cx) && std::isfinite(cy) && std::isfinite(m.var_x) && std::isfinite(m.var_y);
  if (!m.located) m.cx = m.cy = m.var_x = m.var_y = m.cov_xy = 0.0;
  return m;
}

MomentAccumulator::MomentAccumulator(int max_width)
    : col_sum_(static_cast<std::size_t>(max_width)),
      col_y_(static_cast<std::size_t>(max_width)),
      col_yy_(static_cast<std::size_t>(max_width)),
      col_peak_(static_cast<std::size_t>(max_width)),
      col_trough_(static_cast<std::size_t>(max_width)) {}

// Rows are weighted by y - (h-1)/2 (window-centred) so that the second
// moments do not come from the difference of two large numbers.
void MomentAccumulator::accumulate_columns(const float* data, int width, int height, int stride) {
  assert(static_cast<std::size_t>(width) <= col_sum_.size());
  float* __restrict cs = col_sum_.data();
  float* __restrict cy = col_y_.data();
  float* __restrict cyy = col_yy_.data();
  float* __restrict cp = col_peak_.data();
  float* __restrict ct = col_trough_.data();
  const float yc = 0.5f * static_cast<float>(height - 1);
  const float fy0 = -yc;
  for (int x = 0; x < width; ++x) {
    cs[x] = data[x];
    cy[x] = fy0 * data[x];
    cyy[x] = fy0 * fy0 * data[x];
    cp[x] = data[x];
    ct[x] = data[x];
  }
  for (int y = 1; y < height; ++y) {
    const float* __restrict row = data + static_cast<std::size_t>(y) * stride;
    const float fy = static_cast<float>(y) - yc;
    const float fyy = fy * fy;
    for (int x = 0; x < width; ++x) {
      const float v = row[x];
      cs[x] += v;
      cy[x] += fy * v;
      cyy[x] += fyy * v;
      cp[x] = cp[x] < v ? v : cp[x];
      ct[x] = ct[x] > v ? v : ct[x];
    }
  }
}

WindowMoments MomentAccumulator::reduce(int x0, int width, int height) const {
  // Column totals are float (a window height of terms each); the short sums
  // over columns run in double.
  double s = 0.0, sx = 0.0, sy = 0.0, sxx = 0.0, syy = 0.0, sxy = 0.0;
  float peak = col_peak_[x0], trough = col_trough_[x0];
  const double xc = 0.5 * (width - 1), yc = 0.5 * (height - 1);
  for (int x = 0; x < width; ++x) {
    const double fx = x - xc;
    const double c = col_sum_[x0 + x], cy = col_y_[x0 + x];
    s += c;
    sx += fx * c;
    sxx += fx * fx * c;
    sy += cy;
    syy += col_yy_[x0 + x];
    sxy += fx * cy;
    peak = std::max(peak, col_peak_[x0 + x]);
    trough = std::min(trough, col_trough_[x0 + x]);
  }
  WindowMoments m;
  m.flux = s;
  m.peak = peak;
  m.trough = trough;
  if (!(s > 0.0)) return m;
  const double mx = sx / s, my = sy / s;
  const double vx = sxx / s - mx * mx, vy = syy / s - my * my, cxy = sxy / s - mx * my;
  if (!std::isfinite(mx) || !std::isfinite(my) || !std::isfinite(vx) || !std::isfinite(vy) ||
      !std::isfinite(cxy))
    return m;
  m.cx = mx + xc;
  m.cy = my + yc;
  m.var_x = vx;
  m.var_y = vy;
  m.cov_xy = cxy;
  m.located = true;
  return m;
}

WindowMoments MomentAccumulator::window(const WindowView& w) {
  accumulate_columns(w.data, w.width, w.height, w.stride);
  return reduce(0, w.width, w.height);
}

void MomentAccumulator::strip(const StripView& st, std::span<WindowMoments> out) {
  assert(out.size() >= static_cast<std::size_t>(st.n_windows));
  accumulate_columns(st.data, st.width(), st.height, st.stride);
  for (int k = 0; k < st.n_windows; ++k) out[k] = reduce(k * st.window_width, st.window_width, st.height);
}

}  // namespace slopecast::core

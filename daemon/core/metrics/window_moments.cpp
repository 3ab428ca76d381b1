#include "daemon/core/metrics/window_moments.h"

#include <immintrin.h>

#include <algorithm>
#include <cassert>
#include <cmath>
#include <cstdint>

#include "daemon/core/frame/raw_columns.h"

namespace slopecast::core {

SpotShape spot_shape(const WindowMoments& m) {
  SpotShape s;
  if (!m.located) return s;
  spot_shape_of(m.var_x, m.var_y, m.cov_xy, [](double v, double& root) { root = std::sqrt(v); }, s.fwhm_x, s.fwhm_y,
                s.ellipticity);
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

namespace {
// The box's six integer sums over its columns, and the largest column
// maximum.
struct BoxSums {
  std::int64_t r00 = 0, r10 = 0, r20 = 0, r01 = 0, r11 = 0, r02 = 0;
  std::uint32_t peak = 0;
};

BoxSums box_sums_wide(const RawColumns& cols, int x0, int w) {
  BoxSums b;
  const std::uint32_t* c_s = cols.s + x0;
  const std::uint32_t* c_sy = cols.sy + x0;
  const std::uint32_t* c_syy = cols.syy + x0;
  const std::uint32_t* c_max = cols.max + x0;
  for (int x = 0; x < w; ++x) {
    const std::int64_t xs = static_cast<std::int64_t>(x) * c_s[x];
    b.r00 += c_s[x];
    b.r10 += xs;
    b.r20 += x * xs;
    b.r01 += c_sy[x];
    b.r11 += static_cast<std::int64_t>(x) * c_sy[x];
    b.r02 += c_syy[x];
    b.peak = b.peak > c_max[x] ? b.peak : c_max[x];
  }
  return b;
}

std::uint32_t lane_total(__m128i v) {
  v = _mm_add_epi32(v, _mm_shuffle_epi32(v, _MM_SHUFFLE(1, 0, 3, 2)));
  v = _mm_add_epi32(v, _mm_shuffle_epi32(v, _MM_SHUFFLE(2, 3, 0, 1)));
  return static_cast<std::uint32_t>(_mm_cvtsi128_si32(v));
}

// The same sums in 32-bit lanes, four columns at a time (SSE4.1, the
// x86-64-v2 baseline): arithmetic modulo 2^32, exact because every sum's
// true value is below 2^32 (box_sums_fit_32). Columns past w are masked to
// 0; the arrays hold kRawColumnSlack readable entries past the strip.
BoxSums box_sums_32(const RawColumns& cols, int x0, int w) {
  __m128i r00 = _mm_setzero_si128(), r10 = r00, r20 = r00, r01 = r00, r11 = r00, r02 = r00, peak = r00;
  __m128i x = _mm_setr_epi32(0, 1, 2, 3);
  const __m128i four = _mm_set1_epi32(4), width = _mm_set1_epi32(w);
  const auto load = [](const std::uint32_t* p) { return _mm_loadu_si128(reinterpret_cast<const __m128i*>(p)); };
  for (int c = 0; c < w; c += 4, x = _mm_add_epi32(x, four)) {
    const __m128i in = _mm_cmplt_epi32(x, width);
    const __m128i s = _mm_and_si128(in, load(cols.s + x0 + c));
    const __m128i sy = _mm_and_si128(in, load(cols.sy + x0 + c));
    const __m128i syy = _mm_and_si128(in, load(cols.syy + x0 + c));
    const __m128i xs = _mm_mullo_epi32(x, s);
    r00 = _mm_add_epi32(r00, s);
    r10 = _mm_add_epi32(r10, xs);
    r20 = _mm_add_epi32(r20, _mm_mullo_epi32(x, xs));
    r01 = _mm_add_epi32(r01, sy);
    r11 = _mm_add_epi32(r11, _mm_mullo_epi32(x, sy));
    r02 = _mm_add_epi32(r02, syy);
    peak = _mm_max_epu32(peak, _mm_and_si128(in, load(cols.max + x0 + c)));
  }
  BoxSums b;
  b.r00 = lane_total(r00);
  b.r10 = lane_total(r10);
  b.r20 = lane_total(r20);
  b.r01 = lane_total(r01);
  b.r11 = lane_total(r11);
  b.r02 = lane_total(r02);
  peak = _mm_max_epu32(peak, _mm_shuffle_epi32(peak, _MM_SHUFFLE(1, 0, 3, 2)));
  peak = _mm_max_epu32(peak, _mm_shuffle_epi32(peak, _MM_SHUFFLE(2, 3, 0, 1)));
  b.peak = static_cast<std::uint32_t>(_mm_cvtsi128_si32(peak));
  return b;
}
}  // namespace

bool box_sums_fit_32(int w, int h, std::uint32_t max_pixel) {
  // The largest of the six sums when every pixel is max_pixel, in exact
  // double arithmetic (all terms are integers far below 2^53).
  const double v = max_pixel, sx = 0.5 * w * (w - 1.0), sy = 0.5 * h * (h - 1.0);
  const double sxx = (w - 1.0) * w * (2.0 * w - 1.0) / 6.0, syy = (h - 1.0) * h * (2.0 * h - 1.0) / 6.0;
  const double largest = v * std::max({1.0 * w * h, h * sx, w * sy, h * sxx, w * syy, sx * sy});
  return largest < 4294967296.0;
}

WindowMoments folded_moments(const RawColumns& cols, int x0, int w, int h, const FoldedDark& dark, double level,
                             std::span<const PixelPatch> patches, bool fits_32) {
  // Integer sums over the window's columns (exact: each term < 2^32, at
  // most a few hundred of them), in 32-bit lanes where they fit.
  const BoxSums r = fits_32 ? box_sums_32(cols, x0, w) : box_sums_wide(cols, x0, w);
  const std::int64_t r00 = r.r00, r10 = r.r10, r20 = r.r20, r01 = r.r01, r11 = r.r11, r02 = r.r02;
  const std::uint32_t peak = r.peak;
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

namespace {
// Four boxes' moments from their sums, one box per lane: the operations of
// folded_moments(), in its order, on each lane (IEEE arithmetic gives
// each lane the scalar result; neither build has FMA to contract with).
constexpr int kBoxLanes = 4;
typedef double D4 __attribute__((vector_size(kBoxLanes * 8)));

struct BoxLanes {
  D4 r00, r10, r20, r01, r11, r02, d00, d10, d01, d20, d02, d11, level;
};
struct MomentLanes {
  D4 m00, cx, cy, var_x, var_y, cov_xy;
};

[[gnu::always_inline]] inline void moments_x4(const BoxLanes& in, int w, int h, MomentLanes& out) {
  const double sx = 0.5 * w * (w - 1.0), sy = 0.5 * h * (h - 1.0);
  const double sxx = (w - 1.0) * w * (2.0 * w - 1.0) / 6.0, syy = (h - 1.0) * h * (2.0 * h - 1.0) / 6.0;
  const double wd = w, hd = h;
  const D4 m00 = in.r00 - in.d00 - in.level * wd * hd;
  const D4 m10 = in.r10 - in.d10 - in.level * hd * sx;
  const D4 m01 = in.r01 - in.d01 - in.level * wd * sy;
  const D4 m20 = in.r20 - in.d20 - in.level * hd * sxx;
  const D4 m02 = in.r02 - in.d02 - in.level * wd * syy;
  const D4 m11 = in.r11 - in.d11 - in.level * sx * sy;
  out.m00 = m00;
  out.cx = m10 / m00;
  out.cy = m01 / m00;
  out.var_x = m20 / m00 - out.cx * out.cx;
  out.var_y = m02 / m00 - out.cy * out.cy;
  out.cov_xy = m11 / m00 - out.cx * out.cy;
}

void moments_x4_baseline(const BoxLanes& in, int w, int h, MomentLanes& out) { moments_x4(in, w, h, out); }
[[gnu::target("avx2")]] void moments_x4_avx2(const BoxLanes& in, int w, int h, MomentLanes& out) {
  moments_x4(in, w, h, out);
}
}  // namespace

void folded_moments_run(const RawColumns& cols, int count, int w, int h, const FoldedDark* dark, const float* level,
                        bool fits_32, SimdLevel simd, WindowMoments* out) {
  const auto kernel = simd == SimdLevel::kAvx2 ? moments_x4_avx2 : moments_x4_baseline;
  BoxLanes in;
  MomentLanes m;
  std::uint32_t peak[kBoxLanes];
  for (int first = 0; first < count; first += kBoxLanes) {
    for (int b = 0; b < kBoxLanes; ++b) {
      const int k = first + b;
      if (k >= count) {  // lanes past count repeat the last box (their results are not used)
        for (D4* v : {&in.r00, &in.r10, &in.r20, &in.r01, &in.r11, &in.r02, &in.d00, &in.d10, &in.d01, &in.d20,
                      &in.d02, &in.d11, &in.level})
          (*v)[b] = (*v)[b - 1];
        peak[b] = peak[b - 1];
        continue;
      }
      const BoxSums r = fits_32 ? box_sums_32(cols, k * w, w) : box_sums_wide(cols, k * w, w);
      in.r00[b] = static_cast<double>(r.r00);
      in.r10[b] = static_cast<double>(r.r10);
      in.r20[b] = static_cast<double>(r.r20);
      in.r01[b] = static_cast<double>(r.r01);
      in.r11[b] = static_cast<double>(r.r11);
      in.r02[b] = static_cast<double>(r.r02);
      in.d00[b] = dark[k].d00;
      in.d10[b] = dark[k].d10;
      in.d01[b] = dark[k].d01;
      in.d20[b] = dark[k].d20;
      in.d02[b] = dark[k].d02;
      in.d11[b] = dark[k].d11;
      in.level[b] = level[k];
      peak[b] = r.peak;
    }
    kernel(in, w, h, m);
    for (int b = 0; b < kBoxLanes && first + b < count; ++b) {
      WindowMoments& o = out[first + b];
      o = WindowMoments{};
      o.flux = m.m00[b];
      o.peak = peak[b];
      if (!(m.m00[b] > 0.0)) continue;
      o.cx = m.cx[b];
      o.cy = m.cy[b];
      o.var_x = m.var_x[b];
      o.var_y = m.var_y[b];
      o.cov_xy = m.cov_xy[b];
      o.located = std::isfinite(o.cx) && std::isfinite(o.cy) && std::isfinite(o.var_x) && std::isfinite(o.var_y);
      if (!o.located) o.cx = o.cy = o.var_x = o.var_y = o.cov_xy = 0.0;
    }
  }
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

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

namespace {
// The moments' arithmetic, once, for one box (V = double) or four at a time
// (V = D4, one box per lane): each lane gets the scalar result bit for bit
// (the same IEEE operations in the same order; neither build has FMA to
// contract them).
template <typename V>
struct Six {
  V s00, s10, s01, s20, s02, s11;  // sums of w, for w in 1, x, y, x^2, y^2, x y
};

// raw - dark - level: the level's sums are the box geometry's.
template <typename V>
[[gnu::always_inline]] inline void less_dark_and_level(const Six<V>& raw, const Six<V>& dark, const V& level, int w, int h,
                                                       Six<V>& m) {
  const double sx = 0.5 * w * (w - 1.0), sy = 0.5 * h * (h - 1.0);
  const double sxx = (w - 1.0) * w * (2.0 * w - 1.0) / 6.0, syy = (h - 1.0) * h * (2.0 * h - 1.0) / 6.0;
  const double wd = w, hd = h;
  m.s00 = raw.s00 - dark.s00 - level * wd * hd;
  m.s10 = raw.s10 - dark.s10 - level * hd * sx;
  m.s01 = raw.s01 - dark.s01 - level * wd * sy;
  m.s20 = raw.s20 - dark.s20 - level * hd * sxx;
  m.s02 = raw.s02 - dark.s02 - level * wd * syy;
  m.s11 = raw.s11 - dark.s11 - level * sx * sy;
}

// Centre and central second moments (meaningful where s00 > 0).
template <typename V>
[[gnu::always_inline]] inline void centre_of(const Six<V>& m, V& cx, V& cy, V& var_x, V& var_y, V& cov_xy) {
  cx = m.s10 / m.s00;
  cy = m.s01 / m.s00;
  var_x = m.s20 / m.s00 - cx * cx;
  var_y = m.s02 / m.s00 - cy * cy;
  cov_xy = m.s11 / m.s00 - cx * cy;
}

Six<double> six(const FoldedDark& d) { return {d.d00, d.d10, d.d01, d.d20, d.d02, d.d11}; }
Six<double> six(const BoxSums& r) {
  return {static_cast<double>(r.r00), static_cast<double>(r.r10), static_cast<double>(r.r01),
          static_cast<double>(r.r20), static_cast<double>(r.r02), static_cast<double>(r.r11)};
}

// The published moments from the sums and the centre, as in the header.
WindowMoments finish_moments(double flux, double peak, double cx, double cy, double var_x, double var_y,
                             double cov_xy) {
  WindowMoments m;
  m.flux = flux;
  m.peak = peak;
  if (!(flux > 0.0)) return m;
  m.cx = cx;
  m.cy = cy;
  m.var_x = var_x;
  m.var_y = var_y;
  m.cov_xy = cov_xy;
  m.located = std::isfinite(cx) && std::isfinite(cy) && std::isfinite(var_x) && std::isfinite(var_y);
  if (!m.located) m.cx = m.cy = m.var_x = m.var_y = m.cov_xy = 0.0;
  return m;
}
}  // namespace

WindowMoments folded_moments(const RawColumns& cols, int x0, int w, int h, const FoldedDark& dark, double level,
                             std::span<const PixelPatch> patches, bool fits_32) {
  // Integer sums over the window's columns (exact: each term < 2^32, at
  // most a few hundred of them), in 32-bit lanes where they fit.
  const BoxSums r = fits_32 ? box_sums_32(cols, x0, w) : box_sums_wide(cols, x0, w);
  Six<double> m;
  less_dark_and_level(six(r), six(dark), level, w, h, m);
  for (const PixelPatch& q : patches) {
    m.s00 += q.delta;
    m.s10 += q.x * q.delta;
    m.s01 += q.y * q.delta;
    m.s20 += static_cast<double>(q.x) * q.x * q.delta;
    m.s02 += static_cast<double>(q.y) * q.y * q.delta;
    m.s11 += static_cast<double>(q.x) * q.y * q.delta;
  }
  double cx, cy, var_x, var_y, cov_xy;
  centre_of(m, cx, cy, var_x, var_y, cov_xy);
  return finish_moments(m.s00, r.peak, cx, cy, var_x, var_y, cov_xy);
}

namespace {
constexpr int kBoxLanes = 4;
typedef double D4 __attribute__((vector_size(kBoxLanes * 8)));

struct BoxLanes {
  Six<D4> raw, dark;
  D4 level;
};
struct MomentLanes {
  D4 m00, cx, cy, var_x, var_y, cov_xy;
};

[[gnu::always_inline]] inline void moments_x4(const BoxLanes& in, int w, int h, MomentLanes& out) {
  Six<D4> m;
  less_dark_and_level(in.raw, in.dark, in.level, w, h, m);
  out.m00 = m.s00;
  centre_of(m, out.cx, out.cy, out.var_x, out.var_y, out.cov_xy);
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
  Six<double> raw, dark_sums;
  std::uint32_t peak[kBoxLanes];
  const auto put = [](Six<D4>& lanes, int b, const Six<double>& v) {
    lanes.s00[b] = v.s00;
    lanes.s10[b] = v.s10;
    lanes.s01[b] = v.s01;
    lanes.s20[b] = v.s20;
    lanes.s02[b] = v.s02;
    lanes.s11[b] = v.s11;
  };
  for (int first = 0; first < count; first += kBoxLanes) {
    for (int b = 0; b < kBoxLanes; ++b) {
      const int k = first + b;
      if (k < count) {  // lanes past count repeat the last box (their results are not used)
        const BoxSums r = fits_32 ? box_sums_32(cols, k * w, w) : box_sums_wide(cols, k * w, w);
        raw = six(r);
        dark_sums = six(dark[k]);
        peak[b] = r.peak;
        in.level[b] = level[k];
      } else {
        peak[b] = peak[b - 1];
        in.level[b] = in.level[b - 1];
      }
      put(in.raw, b, raw);
      put(in.dark, b, dark_sums);
    }
    kernel(in, w, h, m);
    for (int b = 0; b < kBoxLanes && first + b < count; ++b)
      out[first + b] = finish_moments(m.m00[b], peak[b], m.cx[b], m.cy[b], m.var_x[b], m.var_y[b], m.cov_xy[b]);
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

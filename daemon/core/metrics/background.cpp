#include "daemon/core/metrics/background.h"

#include "daemon/core/frame/box_correction.h"

#include <algorithm>
#include <cassert>
#include <cmath>
#include <cstring>
#include <memory>
#include <type_traits>

#include <immintrin.h>

namespace slopecast::core {

namespace {
const float kRoundingSigma = static_cast<float>(1.0 / std::sqrt(12.0));

// Visits a box's ring pixels in ring order: f(x, y), box-local.
template <typename F>
void for_ring(int w, int h, F f) {
  if (w < 3 || h < 3) {
    for (int y = 0; y < h; ++y)
      for (int x = 0; x < w; ++x) f(x, y);
    return;
  }
  for (int x = 0; x < w; ++x) f(x, 0);
  for (int x = 0; x < w; ++x) f(x, h - 1);
  for (int y = 1; y < h - 1; ++y) {
    f(0, y);
    f(w - 1, y);
  }
}

// Median of v (reorders it). Even counts take the mean of the two middle values.
float median_of(float* v, int n) {
  const int mid = n / 2;
  std::nth_element(v, v + mid, v + n);
  const float upper = v[mid];
  if (n % 2) return upper;
  const float lower = *std::max_element(v, v + mid);
  return 0.5f * (lower + upper);
}
}  // namespace

const char* background_mode_name(BackgroundMode m) {
  switch (m) {
    case BackgroundMode::kNone: return "none";
    case BackgroundMode::kBorder: return "border";
    case BackgroundMode::kBorderMedian: return "border_median";
  }
  return "?";
}

bool parse_background_mode(const char* name, BackgroundMode& out) {
  for (BackgroundMode m : {BackgroundMode::kNone, BackgroundMode::kBorder, BackgroundMode::kBorderMedian})
    if (std::strcmp(background_mode_name(m), name) == 0) {
      out = m;
      return true;
    }
  return false;
}

int border_pixel_count(int width, int height) {
  if (width < 3 || height < 3) return width * height;
  return 2 * width + 2 * (height - 2);
}

namespace {

// The clean-ring test and its answer, for one ring (V = float) or eight at
// once (V = F8, one ring per vector lane). Accumulator j sums the ring
// positions k = j (mod 4), in increasing k, and the four are added in
// double in the order 0, 1, 2, 3: the same operations on every lane, so
// eight rings measured together get, bit for bit, what each gets alone.
constexpr int kBatch = 8;
typedef float F8 __attribute__((vector_size(kBatch * 4)));
typedef int I8 __attribute__((vector_size(kBatch * 4)));
typedef double D8 __attribute__((vector_size(kBatch * 8)));

template <typename V> struct RingLanes;
template <> struct RingLanes<float> {
  using I = int;
  using D = double;
  static constexpr int kCount = 1;
};
template <> struct RingLanes<F8> {
  using I = I8;
  using D = D8;
  static constexpr int kCount = kBatch;
};

template <typename T>
auto lane(const T& v, int b) {
  if constexpr (std::is_arithmetic_v<T>) return v;
  else return v[b];
}
template <typename T, typename X>
void set_lane(T& v, int b, X x) {
  if constexpr (std::is_arithmetic_v<T>) v = x;
  else v[b] = x;
}
// to = from, lane by lane, converted as static_cast converts one value.
template <typename To, typename From>
void convert(const From& from, To& to) {
  if constexpr (std::is_arithmetic_v<From>) to = static_cast<To>(from);
  else to = __builtin_convertvector(from, To);
}

struct CleanRing {
  bool finite = false;  // no NaN or infinity in the ring
  bool clean = false;   // the short cut holds: level and sigma below are the answer
  float level = 0.0f, sigma = 0.0f;
};

// load(k): a reference to ring value k (of each ring), k < n. out: one
// per lane.
template <typename V, typename Load>
[[gnu::always_inline]] inline void clean_ring(Load load, int n, CleanRing* out) {
  using I = typename RingLanes<V>::I;
  using D = typename RingLanes<V>::D;
  const auto sum4 = [](const V& a0, const V& a1, const V& a2, const V& a3, D& total) {
    D t0, t1, t2, t3;
    convert(a0, t0);
    convert(a1, t1);
    convert(a2, t2);
    convert(a3, t3);
    total = t0 + t1 + t2 + t3;
  };
  // Visits k = 0 .. n-1 as f(accumulator k mod 4, k), four at a time (so
  // that the accumulators stay in registers).
  const auto by_four = [n](auto f) {
    int k = 0;
    for (; k + 4 <= n; k += 4) {
      f(0, k);
      f(1, k + 1);
      f(2, k + 2);
      f(3, k + 3);
    }
    for (int j = 0; k < n; ++k, ++j) f(j, k);
  };
  // One pass: v * 0 is 0 for a finite v and NaN for a NaN or infinity.
  V s0 = {}, s1 = {}, s2 = {}, s3 = {}, z0 = {}, z1 = {}, z2 = {}, z3 = {};
  by_four([&](int j, int k) {
    const V& v = load(k);
    V& sj = j == 0 ? s0 : j == 1 ? s1 : j == 2 ? s2 : s3;
    V& zj = j == 0 ? z0 : j == 1 ? z1 : j == 2 ? z2 : z3;
    sj += v;
    zj += v * 0.0f;
  });
  D zero, mean;
  sum4(z0, z1, z2, z3, zero);
  sum4(s0, s1, s2, s3, mean);
  mean /= static_cast<double>(n);
  // A clean ring needs no median. If every value lies within c of the
  // median, where c = 3.5 max(rms about the mean m, 1/sqrt 12) is a lower
  // bound of the clip the second round of the full procedure would use (the
  // rms about the median is at least the rms about the mean), that round
  // keeps them all and the answer is m and the sample rms. Every value is
  // within c of the median exactly when the median lies in
  // [max - c, min + c], which counting decides without sorting: the lower
  // middle value is >= max - c when fewer than n/2 values lie below it, and
  // the upper middle value is <= min + c when fewer than n - n/2 values lie
  // above it. Derived; checked against the full procedure in
  // background_test. Rings with a hot pixel or a spot tail fail the test.
  V mf;
  convert(mean, mf);
  V q0 = {}, q1 = {}, q2 = {}, q3 = {}, lo = load(0), hi = load(0);
  by_four([&](int j, int k) {
    const V& v = load(k);
    V& qj = j == 0 ? q0 : j == 1 ? q1 : j == 2 ? q2 : q3;
    const V d = v - mf;
    qj += d * d;
    lo = v < lo ? v : lo;
    hi = v > hi ? v : hi;
  });
  D sum_sq;
  sum4(q0, q1, q2, q3, sum_sq);
  V low = {}, high = {};
  for (int b = 0; b < RingLanes<V>::kCount; ++b) {
    const double c = 3.5 * std::max(std::sqrt(lane(sum_sq, b) / n), static_cast<double>(kRoundingSigma));
    set_lane(low, b, static_cast<float>(lane(hi, b) - c));
    set_lane(high, b, static_cast<float>(lane(lo, b) + c));
  }
  const I one = I{} + 1, none = I{};
  I below = {}, above = {};
  for (int k = 0; k < n; ++k) {
    const V v = load(k);
    below += v < low ? one : none;
    above += v > high ? one : none;
  }
  const int mid = n / 2;
  for (int b = 0; b < RingLanes<V>::kCount; ++b) {
    CleanRing& r = out[b];
    r.finite = lane(zero, b) == 0.0;
    r.clean = r.finite && lane(below, b) <= mid - 1 && lane(above, b) <= n - mid - 1;
    r.level = lane(mf, b);
    const double ss = lane(sum_sq, b);
    r.sigma = std::max(static_cast<float>(n > 1 ? std::sqrt(ss / (n - 1)) : 0.0), kRoundingSigma);
  }
}

// 4 float lanes, one SSE register on the x86-64-v2 baseline, for the full
// procedure's rounds: reductions, which the compiler may not reorder on its
// own, so the lanes are written out, with selects as bit masks.
typedef float F4 __attribute__((vector_size(16)));
typedef int I4 __attribute__((vector_size(16)));

double lane_sum(F4 v) { return static_cast<double>(v[0]) + v[1] + v[2] + v[3]; }
F4 load4(const float* p) {
  F4 v;
  std::memcpy(&v, p, sizeof v);
  return v;
}
F4 select(I4 mask, F4 v) { return reinterpret_cast<F4>(mask & reinterpret_cast<I4>(v)); }
F4 absolute(F4 v) { return reinterpret_cast<F4>(reinterpret_cast<I4>(v) & 0x7fffffff); }
int lane_total(I4 v) { return v[0] + v[1] + v[2] + v[3]; }

// The full procedure for a finite ring that is not clean. work holds n + 4
// floats and is overwritten.
BorderStats clipped_ring_stats(const float* ring, int n, float* work) {
  BorderStats b;
  b.n_border = n;
  std::copy(ring, ring + n, work);
  const float median = median_of(work, n);
  // The median anchors the ring; rounds of 3.5-sigma clipping about it (until
  // no pixel changes side) remove outliers (hot pixels, a spot tail), the
  // first round's sigma taken from all pixels (an outlier only widens it),
  // each next from the pixels the previous kept. The level is the mean of
  // the pixels kept: on integer data the median sticks to whole ADU, and each
  // 1 ADU step moves a 225-pixel box's flux by 225 ADU, which gave empty
  // boxes a lumpy, long-tailed flux (measured: a significance of 6.3 among
  // 51 200 empty boxes). A second selection for the MAD cost 0.6 us per box.
  const int padded = (n + 3) / 4 * 4;
  for (int k = 0; k < n; ++k) work[k] = ring[k] - median;
  for (int k = n; k < padded; ++k) work[k] = HUGE_VALF;  // never kept
  double clip = HUGE_VAL, mean_d = 0.0, var = 0.0;
  int kept = 0;
  for (int round = 0; round < 8; ++round) {  // until no pixel changes side; 8 at most
    const float c = static_cast<float>(std::min(clip, 3.0e38));
    F4 s1 = {}, s2 = {};
    I4 count = {};
    for (int k = 0; k < padded; k += 4) {
      const F4 d = load4(work + k);
      const I4 in = absolute(d) <= c;
      const F4 kept_d = select(in, d);
      s1 += kept_d;
      s2 += kept_d * kept_d;
      count -= in;
    }
    const int k_round = lane_total(count);
    const double t1 = lane_sum(s1), t2 = lane_sum(s2);
    // The median lies within any clip of at least half the ring, so k_round > 0.
    const bool stable = k_round == kept;
    kept = k_round;
    mean_d = t1 / kept;
    var = kept > 1 ? std::max((t2 - kept * mean_d * mean_d) / (kept - 1), 0.0) : 0.0;
    if (stable) break;
    clip = 3.5 * std::max(std::sqrt(t2 / kept), static_cast<double>(kRoundingSigma));
  }
  b.level_adu = static_cast<float>(median + mean_d);
  b.n_kept = kept;
  b.sigma_adu = std::max(static_cast<float>(std::sqrt(var)), kRoundingSigma);
  return b;
}

// The answer for one ring from its clean-ring test: the short cut's, not
// finite, or the full procedure's.
BorderStats ring_answer(const CleanRing& c, const float* ring, int n, float* work) {
  BorderStats b;
  b.n_border = n;
  if (!c.finite) {
    b.finite = false;  // nth_element needs a strict weak order: no NaN
    return b;
  }
  if (!c.clean) return clipped_ring_stats(ring, n, work);
  b.level_adu = c.level;
  b.n_kept = n;
  b.sigma_adu = c.sigma;
  return b;
}

// Level and noise of n ring values (ring order), as in the header. work
// holds n + 4 floats and is overwritten.
BorderStats ring_stats(const float* ring, int n, float* work) {
  CleanRing c;
  clean_ring<float>([ring](int k) -> const float& { return ring[k]; }, n, &c);
  return ring_answer(c, ring, n, work);
}

// The median estimator: level = median, sigma = 1.4826 MAD.
BorderStats ring_median_stats(const float* ring, int n, float* work) {
  BorderStats b;
  b.n_border = n;
  b.n_kept = n;
  if (n <= 0) return b;
  for (int k = 0; k < n; ++k)
    if (!std::isfinite(ring[k])) {
      b.finite = false;
      b.n_kept = 0;
      return b;
    }
  std::copy(ring, ring + n, work);
  const float median = median_of(work, n);
  for (int k = 0; k < n; ++k) work[k] = std::abs(ring[k] - median);
  const float mad = median_of(work, n);
  b.level_adu = median;
  b.sigma_adu = std::max(1.4826f * mad, kRoundingSigma);
  return b;
}

// ring: n values with room for padded_size(n); the work area follows it.
BorderStats stats_for(BackgroundMode mode, float* ring, int n) {
  float* work = ring + n + 4;
  return mode == BackgroundMode::kBorderMedian ? ring_median_stats(ring, n, work) : ring_stats(ring, n, work);
}

}  // namespace

void gather_border(const WindowView& w, float* ring) {
  int k = 0;
  for_ring(w.width, w.height, [&](int x, int y) { ring[k++] = w.data[static_cast<std::size_t>(y) * w.stride + x]; });
}

BorderStats border_stats(const WindowView& w, std::span<float> scratch, BackgroundMode mode) {
  const int n = border_pixel_count(w.width, w.height);
  assert(scratch.size() >= 2 * static_cast<std::size_t>(n) + 8);
  gather_border(w, scratch.data());
  return stats_for(mode, scratch.data(), n);
}

namespace {
// Four pixels of type T as floats (the conversion is the scalar one, lane
// by lane): SSE4.1 widening for u8 and u16, element by element otherwise.
template <typename T>
F4 load4_as_float(const std::byte* src) {
  if constexpr (std::is_same_v<T, std::uint16_t>) {
    return reinterpret_cast<F4>(
        _mm_cvtepi32_ps(_mm_cvtepu16_epi32(_mm_loadl_epi64(reinterpret_cast<const __m128i*>(src)))));
  } else if constexpr (std::is_same_v<T, std::uint8_t>) {
    std::int32_t four;
    std::memcpy(&four, src, sizeof four);
    return reinterpret_cast<F4>(_mm_cvtepi32_ps(_mm_cvtepu8_epi32(_mm_cvtsi32_si128(four))));
  } else {
    return F4{static_cast<float>(load_pixel<T>(src, 0)), static_cast<float>(load_pixel<T>(src, 1)),
              static_cast<float>(load_pixel<T>(src, 2)), static_cast<float>(load_pixel<T>(src, 3))};
  }
}

// n pixels of type T from src, as floats, minus dark[0 .. n-1] when kDark:
// four at a time, the last four overlapping the ones before when n is not
// a multiple of 4 (the same values written twice), one by one when n < 4.
template <typename T, bool kDark>
void convert_run(const std::byte* src, const float* __restrict dark, float* __restrict out, int n) {
  const auto four = [&](int x) {
    F4 v = load4_as_float<T>(src + x * sizeof(T));
    if constexpr (kDark) v -= load4(dark + x);
    std::memcpy(out + x, &v, sizeof v);
  };
  if (n < 4) {
    for (int x = 0; x < n; ++x) {
      const float v = static_cast<float>(load_pixel<T>(src, static_cast<std::size_t>(x)));
      out[x] = kDark ? v - dark[x] : v;
    }
    return;
  }
  int x = 0;
  for (; x + 4 <= n; x += 4) four(x);
  if (x < n) four(n - 4);
}

// The ring in ring order, minus the dark's ring values when there is a
// dark: the top and bottom rows as two contiguous runs, then the side
// pixels a row at a time.
template <typename T, bool kDark>
void gather_ring(const ImageView& image, const float* __restrict ring_dark, const Box& box, float* __restrict ring) {
  const int w = box.width, h = box.height;
  const std::size_t left = static_cast<std::size_t>(box.x0) * sizeof(T);
  const auto dark_at = [&](int k) { return kDark ? ring_dark + k : nullptr; };
  if (w < 3 || h < 3) {
    for (int y = 0; y < h; ++y)
      convert_run<T, kDark>(image.row(box.y0 + y) + left, dark_at(y * w), ring + y * w, w);
    return;
  }
  convert_run<T, kDark>(image.row(box.y0) + left, dark_at(0), ring, w);
  convert_run<T, kDark>(image.row(box.y0 + h - 1) + left, dark_at(w), ring + w, w);
  const std::size_t right = static_cast<std::size_t>(w - 1) * sizeof(T);
  // The side pixels, two per row, as pairs: (left, right) of a row are
  // ring values k, k + 1 with k even, so one 2-lane subtraction per row.
  const std::byte* row = image.row(box.y0 + 1) + left;
  const std::size_t stride = image.row_stride_bytes;
  for (int y = 1, k = 2 * w; y < h - 1; ++y, k += 2, row += stride) {
    typedef float F2 __attribute__((vector_size(8)));
    F2 v = {static_cast<float>(load_pixel<T>(row, 0)), static_cast<float>(load_pixel<T>(row + right, 0))};
    if constexpr (kDark) {
      F2 d;
      std::memcpy(&d, ring_dark + k, sizeof d);
      v -= d;
    }
    std::memcpy(ring + k, &v, sizeof v);
  }
}

template <typename T>
void gather_ring(const ImageView& image, const float* ring_dark, const Box& box, float* ring) {
  if (ring_dark)
    gather_ring<T, true>(image, ring_dark, box, ring);
  else
    gather_ring<T, false>(image, ring_dark, box, ring);
}
}  // namespace

void ring_dark_values(std::span<const float> dark, int image_width, const Box& box, float* out) {
  int k = 0;
  for_ring(box.width, box.height, [&](int x, int y) {
    out[k++] = dark[static_cast<std::size_t>(box.y0 + y) * image_width + box.x0 + x];
  });
}

void gather_border_raw(const ImageView& image, std::span<const float> ring_dark, const Box& box, float* ring) {
  assert(ring_dark.empty() || ring_dark.size() >= static_cast<std::size_t>(border_pixel_count(box.width, box.height)));
  const float* d = ring_dark.empty() ? nullptr : ring_dark.data();
  switch (image.format) {
    case PixelFormat::kU8: gather_ring<std::uint8_t>(image, d, box, ring); break;
    case PixelFormat::kU16: gather_ring<std::uint16_t>(image, d, box, ring); break;
    case PixelFormat::kU32: gather_ring<std::uint32_t>(image, d, box, ring); break;
    case PixelFormat::kF32: gather_ring<float>(image, d, box, ring); break;
  }
}

namespace {

// Eight rings at a time, one box per lane, with clean_ring<F8>: each box's
// figures are bit for bit those of ring_stats() (see clean_ring). Built
// twice, for the baseline and for AVX2 (no FMA in either, so no
// contraction changes a rounding); tests compare both with ring_stats().
// soa[k] holds ring value k of the eight boxes.
void batch_baseline(const F8* soa, int n, CleanRing* out) {
  clean_ring<F8>([soa](int k) -> const F8& { return soa[k]; }, n, out);
}
[[gnu::target("avx2")]] void batch_avx2(const F8* soa, int n, CleanRing* out) {
  clean_ring<F8>([soa](int k) -> const F8& { return soa[k]; }, n, out);
}

}  // namespace

void border_stats_batch(float* rings, int stride, int count, int n, BackgroundMode mode, std::span<BorderStats> out,
                        std::span<float> soa, SimdLevel simd) {
  assert(stride >= 2 * n + 8 && out.size() >= static_cast<std::size_t>(count));
  if (mode == BackgroundMode::kBorderMedian || n < 4) {
    for (int i = 0; i < count; ++i) out[i] = stats_for(mode, rings + static_cast<std::size_t>(i) * stride, n);
    return;
  }
  assert(soa.size() >= static_cast<std::size_t>(border_batch_scratch_size(n)));
  void* start = soa.data();
  std::size_t room = soa.size() * sizeof(float);
  // 32 bytes: an AVX2 register (alignof(F8) is only 16 in the baseline build).
  F8* v = static_cast<F8*>(std::align(32, sizeof(F8) * n, start, room));
  assert(v != nullptr);
  const auto batch = simd == SimdLevel::kAvx2 ? batch_avx2 : batch_baseline;
  CleanRing result[kBatch];
  // A batch costs about as much as three rings alone: the last one or two
  // boxes of a run (and runs of one box, in layouts that are not a grid)
  // are measured alone.
  constexpr int kFewestForBatch = 3;
  int first = 0;
  for (; count - first >= kFewestForBatch; first += kBatch) {
    // Transposed: v[k][b] = ring value k of box first + b (the last box
    // repeated in lanes past count).
    // 4 x 4 blocks through SSE registers; the rings are readable to a
    // multiple of 4 (the values past n are not used).
    for (int q = 0; q < kBatch; q += 4) {
      const float* r[4];
      for (int j = 0; j < 4; ++j) r[j] = rings + static_cast<std::size_t>(std::min(first + q + j, count - 1)) * stride;
      for (int k = 0; k < n; k += 4) {
        __m128 a = _mm_loadu_ps(r[0] + k), b = _mm_loadu_ps(r[1] + k), c = _mm_loadu_ps(r[2] + k),
               d = _mm_loadu_ps(r[3] + k);
        _MM_TRANSPOSE4_PS(a, b, c, d);
        float* out_k = reinterpret_cast<float*>(v + k) + q;
        _mm_storeu_ps(out_k, a);
        _mm_storeu_ps(out_k + kBatch, b);
        _mm_storeu_ps(out_k + 2 * kBatch, c);
        _mm_storeu_ps(out_k + 3 * kBatch, d);
      }
    }
    batch(v, n, result);
    for (int b = 0; b < kBatch && first + b < count; ++b) {
      const float* ring = rings + static_cast<std::size_t>(first + b) * stride;
      out[first + b] = ring_answer(result[b], ring, n, rings + static_cast<std::size_t>(first + b) * stride + n + 4);
    }
  }
  for (; first < count; ++first) out[first] = ring_stats(rings + static_cast<std::size_t>(first) * stride, n,
                                                         rings + static_cast<std::size_t>(first) * stride + n + 4);
}

void subtract_constant(float* data, int width, int height, int stride, float value) {
  for (int y = 0; y < height; ++y) {
    float* r = data + static_cast<std::size_t>(y) * stride;
    for (int x = 0; x < width; ++x) r[x] -= value;
  }
}

double flux_snr(double flux, double sigma_pix, int n_pixels, int n_ring, bool subtracted) {
  double snr;
  flux_snr_of(flux, sigma_pix, n_pixels, static_cast<double>(n_ring), subtracted,
              [](double v, double& root) { root = std::sqrt(v); }, snr);
  return snr;
}

}  // namespace slopecast::core

#include "daemon/core/frame/raw_columns.h"

#include <cassert>
#include <cstring>

namespace slopecast::core {

namespace {

constexpr int kLanes = 8;

// GCC vector extensions: 16 unsigned 32-bit lanes, which the compiler maps
// to four SSE or two AVX2 registers per accumulator, so the accumulators
// stay in registers over the strip height whatever the target.
typedef std::uint32_t Lanes __attribute__((vector_size(kLanes * 4)));

template <typename Pixel>
[[gnu::always_inline]] inline void accumulate(const ImageView& image, int x0, int y0, int w, int h,
                                              const RawColumns& out) {
  typedef Pixel Narrow __attribute__((vector_size(kLanes * sizeof(Pixel))));
  int x = 0;
  for (; x + kLanes <= w; x += kLanes) {
    Lanes s = {}, t = {}, u = {}, m = {};
    const std::byte* p = image.row(y0) + static_cast<std::size_t>(x0 + x) * sizeof(Pixel);
    for (int y = 0; y < h; ++y, p += image.row_stride_bytes) {
      Narrow n;
      std::memcpy(&n, p, sizeof n);  // unaligned, little-endian (pixel_format.h)
      const Lanes v = __builtin_convertvector(n, Lanes);
      s += v;
      t += s;
      u += t;
      m = m > v ? m : v;
    }
    const std::uint32_t hh = static_cast<std::uint32_t>(h);
    const Lanes sy = hh * s - t, syy = hh * hh * s - 2 * hh * t + 2 * u - t;  // modulo 2^32, exact (header)
    std::memcpy(out.s + x, &s, sizeof s);
    std::memcpy(out.sy + x, &sy, sizeof sy);
    std::memcpy(out.syy + x, &syy, sizeof syy);
    std::memcpy(out.max + x, &m, sizeof m);
  }
  for (; x < w; ++x) {  // the last columns of a strip narrower than a multiple of 16
    std::uint32_t s = 0, t = 0, u = 0, m = 0;
    for (int y = 0; y < h; ++y) {
      const std::uint32_t v = load_pixel<Pixel>(image.row(y0 + y), x0 + x);
      s += v;
      t += s;
      u += t;
      m = m > v ? m : v;
    }
    const std::uint32_t hh = static_cast<std::uint32_t>(h);
    out.s[x] = s;
    out.sy[x] = hh * s - t;
    out.syy[x] = hh * hh * s - 2 * hh * t + 2 * u - t;
    out.max[x] = m;
  }
}

void u8_baseline(const ImageView& im, int x0, int y0, int w, int h, const RawColumns& o) {
  accumulate<std::uint8_t>(im, x0, y0, w, h, o);
}
void u16_baseline(const ImageView& im, int x0, int y0, int w, int h, const RawColumns& o) {
  accumulate<std::uint16_t>(im, x0, y0, w, h, o);
}
[[gnu::target("avx2")]] void u8_avx2(const ImageView& im, int x0, int y0, int w, int h, const RawColumns& o) {
  accumulate<std::uint8_t>(im, x0, y0, w, h, o);
}
[[gnu::target("avx2")]] void u16_avx2(const ImageView& im, int x0, int y0, int w, int h, const RawColumns& o) {
  accumulate<std::uint16_t>(im, x0, y0, w, h, o);
}

}  // namespace

SimdLevel best_simd_level() {
  __builtin_cpu_init();
  return __builtin_cpu_supports("avx2") ? SimdLevel::kAvx2 : SimdLevel::kBaseline;
}

const char* simd_level_name(SimdLevel level) { return level == SimdLevel::kAvx2 ? "avx2" : "baseline"; }

RawColumnKernel raw_column_kernel(PixelFormat format, SimdLevel level) {
  const bool avx2 = level == SimdLevel::kAvx2;
  switch (format) {
    case PixelFormat::kU8: return avx2 ? u8_avx2 : u8_baseline;
    case PixelFormat::kU16: return avx2 ? u16_avx2 : u16_baseline;
    default: return nullptr;
  }
}

}  // namespace slopecast::core

// Column sums of raw integer pixels, the first pass of the folded path.
//
// For a strip of rows 0..H-1 and each column, with v_y the raw pixel of row
// y, the kernel keeps three running sums in 32-bit integer lanes -- S += v,
// T += S, U += T after each row -- and the column maximum:
//
//   S = sum v_y,   T = sum v_y (H - y),   U = sum v_y (H - y)(H - y + 1)/2
//
// from which, with m = H - y (derived by summing the recurrences),
//
//   sum y v   = H S - T,
//   sum y^2 v = H^2 S - 2 H T + 2 U - T.
//
// No multiply in the pixel loop. After the last row the kernel forms
// sum y v and sum y^2 v per column itself, in the same 32-bit lanes: unsigned
// arithmetic wraps modulo 2^32, so the result is exact whenever the true
// value fits, and sum y^2 v <= v_max (H-1)H(2H-1)/6 fits for H <= 56 with
// u16 pixels (u8 allows more): kMaxRawColumnHeight below (the pipeline falls
// back to float correction beyond it, and for u32 and f32 pixels).
//
// The loop sweeps 16 columns at a time with the 64 accumulators held over
// the whole strip height, then stores them: one load per pixel and nothing
// else touches memory. A baseline (x86-64-v2) and an AVX2 variant of the
// same source are built; raw_column_kernel() picks one, and tests run both
// on the same inputs (integer arithmetic: they agree exactly).
#pragma once

#include <cstdint>

#include "daemon/core/frame/image_view.h"

namespace slopecast::core {

inline constexpr int kMaxRawColumnHeight = 56;

// Whether frames of this format and strips of this height can use the
// integer kernel exactly.
constexpr bool raw_columns_exact(PixelFormat f, int height) {
  return (f == PixelFormat::kU8 || f == PixelFormat::kU16) && height <= kMaxRawColumnHeight;
}

enum class SimdLevel { kBaseline, kAvx2 };
// The best level this CPU runs (cpuid; no I/O).
SimdLevel best_simd_level();
const char* simd_level_name(SimdLevel level);

// Entries past a strip's last column that RawColumns arrays keep readable
// (folded_moments reads columns four at a time and masks these out).
inline constexpr int kRawColumnSlack = 3;

struct RawColumns {
  std::uint32_t* s;    // sum v
  std::uint32_t* sy;   // sum y v
  std::uint32_t* syy;  // sum y^2 v
  std::uint32_t* max;  // largest v
};

// Accumulates rows y0 .. y0+h-1 of columns x0 .. x0+w-1 into out[0 .. w-1].
// Preconditions: raw_columns_exact(image.format, h); the box lies inside the
// image.
using RawColumnKernel = void (*)(const ImageView& image, int x0, int y0, int w, int h, const RawColumns& out);
RawColumnKernel raw_column_kernel(PixelFormat format, SimdLevel level);

}  // namespace slopecast::core

#include "daemon/core/frame/box_correction.h"

#include <cassert>
#include <cstdint>

namespace slopecast::core {

namespace {

// One loop per (dark?, column max?, gain?) combination, so the common
// cases stay branch-free and vectorise.
template <typename T, bool kDark, bool kColumnMax, bool kGain>
void correct_typed(const ImageView& image, const float* dark, const Box& box, float* out, float* col_max,
                   const float* gain) {
  for (int y = 0; y < box.height; ++y) {
    const std::byte* row = image.row(box.y0 + y);
    float* dst = out + static_cast<std::size_t>(y) * box.width;
    const std::size_t at = static_cast<std::size_t>(box.y0 + y) * image.width + box.x0;
    const float* d = kDark ? dark + at : nullptr;
    const float* g = kGain ? gain + at : nullptr;
    for (int x = 0; x < box.width; ++x) {
      const float raw = static_cast<float>(load_pixel<T>(row, box.x0 + x));
      if constexpr (kColumnMax) {
        const float seen = kGain && g[x] == 0.0f ? 0.0f : raw;  // a bad pixel does not count
        col_max[x] = (y == 0 || col_max[x] < seen) ? seen : col_max[x];
      }
      float v = raw;
      if constexpr (kDark) v -= d[x];
      if constexpr (kGain) v *= g[x];
      dst[x] = v;
    }
  }
}

template <typename T, bool kDark, bool kColumnMax>
void correct_gain(const ImageView& image, const float* dark, const Box& box, float* out, float* col_max,
                  const float* gain) {
  if (gain) correct_typed<T, kDark, kColumnMax, true>(image, dark, box, out, col_max, gain);
  else correct_typed<T, kDark, kColumnMax, false>(image, dark, box, out, col_max, nullptr);
}

template <typename T>
void correct_dispatch(const ImageView& image, std::span<const float> dark, const Box& box, float* out,
                      std::span<float> col_max, std::span<const float> gain) {
  const bool has_dark = !dark.empty(), has_max = !col_max.empty();
  const float* g = gain.empty() ? nullptr : gain.data();
  if (has_dark && has_max) correct_gain<T, true, true>(image, dark.data(), box, out, col_max.data(), g);
  else if (has_dark) correct_gain<T, true, false>(image, dark.data(), box, out, nullptr, g);
  else if (has_max) correct_gain<T, false, true>(image, nullptr, box, out, col_max.data(), g);
  else correct_gain<T, false, false>(image, nullptr, box, out, nullptr, g);
}

}  // namespace

void correct_box(const ImageView& image, std::span<const float> dark, const Box& box,
                 std::span<float> out, std::span<float> raw_column_max, std::span<const float> gain) {
  assert(box.x0 >= 0 && box.y0 >= 0 && box.x0 + box.width <= image.width &&
         box.y0 + box.height <= image.height);
  assert(out.size() >= static_cast<std::size_t>(box.width) * box.height);
  assert(dark.empty() || dark.size() == static_cast<std::size_t>(image.width) * image.height);
  assert(raw_column_max.empty() || raw_column_max.size() >= static_cast<std::size_t>(box.width));
  assert(gain.empty() || gain.size() == static_cast<std::size_t>(image.width) * image.height);
  switch (image.format) {
    case PixelFormat::kU8: correct_dispatch<std::uint8_t>(image, dark, box, out.data(), raw_column_max, gain); break;
    case PixelFormat::kU16: correct_dispatch<std::uint16_t>(image, dark, box, out.data(), raw_column_max, gain); break;
    case PixelFormat::kU32: correct_dispatch<std::uint32_t>(image, dark, box, out.data(), raw_column_max, gain); break;
    case PixelFormat::kF32: correct_dispatch<float>(image, dark, box, out.data(), raw_column_max, gain); break;
  }
}

}  // namespace slopecast::core

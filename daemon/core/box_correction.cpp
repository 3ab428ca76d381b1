#include "daemon/core/box_correction.h"

#include <cassert>
#include <cstdint>

namespace slopecast::core {

namespace {

template <typename T>
void correct_typed(const ImageView& image, std::span<const float> dark, const Box& box,
                   float* out) {
  for (int y = 0; y < box.height; ++y) {
    const std::byte* row = image.row(box.y0 + y);
    float* dst = out + static_cast<std::size_t>(y) * box.width;
    if (dark.empty()) {
      for (int x = 0; x < box.width; ++x)
        dst[x] = static_cast<float>(load_pixel<T>(row, box.x0 + x));
    } else {
      const float* d = dark.data() + static_cast<std::size_t>(box.y0 + y) * image.width + box.x0;
      for (int x = 0; x < box.width; ++x)
        dst[x] = static_cast<float>(load_pixel<T>(row, box.x0 + x)) - d[x];
    }
  }
}

}  // namespace

void correct_box(const ImageView& image, std::span<const float> dark, const Box& box,
                    std::span<float> out) {
  assert(box.x0 >= 0 && box.y0 >= 0 && box.x0 + box.width <= image.width &&
         box.y0 + box.height <= image.height);
  assert(out.size() >= static_cast<std::size_t>(box.width) * box.height);
  assert(dark.empty() || dark.size() == static_cast<std::size_t>(image.width) * image.height);
  switch (image.format) {
    case PixelFormat::kU8: correct_typed<std::uint8_t>(image, dark, box, out.data()); break;
    case PixelFormat::kU16: correct_typed<std::uint16_t>(image, dark, box, out.data()); break;
    case PixelFormat::kU32: correct_typed<std::uint32_t>(image, dark, box, out.data()); break;
    case PixelFormat::kF32: correct_typed<float>(image, dark, box, out.data()); break;
  }
}

}  // namespace slopecast::core

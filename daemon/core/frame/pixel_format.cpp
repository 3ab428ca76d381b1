#include "daemon/core/frame/pixel_format.h"

namespace slopecast::core {

std::string_view pixel_format_name(PixelFormat f) {
  switch (f) {
    case PixelFormat::kU8: return "u8";
    case PixelFormat::kU16: return "u16";
    case PixelFormat::kU32: return "u32";
    case PixelFormat::kF32: return "f32";
  }
  return "?";
}

std::optional<PixelFormat> parse_pixel_format(std::string_view name) {
  for (PixelFormat f : {PixelFormat::kU8, PixelFormat::kU16, PixelFormat::kU32,
                        PixelFormat::kF32}) {
    if (pixel_format_name(f) == name) return f;
  }
  return std::nullopt;
}

}  // namespace slopecast::core

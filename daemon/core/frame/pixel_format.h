// Pixel encodings the core can read, and how to read one pixel.
//
// Frames arrive little-endian (see proto/slopecast/v1/frame.proto). The core
// reads pixels through load_pixel(), which copies bytes with memcpy so that a
// payload need not be aligned for its type; compilers turn this into a plain
// load on x86-64.
#pragma once

#include <bit>
#include <cstddef>
#include <cstdint>
#include <cstring>
#include <optional>
#include <string_view>

namespace slopecast::core {

static_assert(std::endian::native == std::endian::little,
              "slopecast reads little-endian pixels in place; a big-endian host "
              "would need a byte swap in load_pixel()");

enum class PixelFormat : std::uint8_t { kU8, kU16, kU32, kF32 };

// Bytes one pixel occupies.
constexpr std::size_t bytes_per_pixel(PixelFormat f) {
  switch (f) {
    case PixelFormat::kU8: return 1;
    case PixelFormat::kU16: return 2;
    case PixelFormat::kU32:
    case PixelFormat::kF32: return 4;
  }
  return 0;
}

// Lower-case name used in configs and messages: "u8", "u16", "u32", "f32".
std::string_view pixel_format_name(PixelFormat f);
// Inverse of pixel_format_name(); nullopt for anything else.
std::optional<PixelFormat> parse_pixel_format(std::string_view name);

// The C++ type stored for each format.
template <PixelFormat F> struct PixelTypeOf;
template <> struct PixelTypeOf<PixelFormat::kU8> { using type = std::uint8_t; };
template <> struct PixelTypeOf<PixelFormat::kU16> { using type = std::uint16_t; };
template <> struct PixelTypeOf<PixelFormat::kU32> { using type = std::uint32_t; };
template <> struct PixelTypeOf<PixelFormat::kF32> { using type = float; };

// Reads pixel i of a row whose bytes start at row; no alignment required.
template <typename T>
inline T load_pixel(const std::byte* row, std::size_t i) {
  T v;
  std::memcpy(&v, row + i * sizeof(T), sizeof(T));
  return v;
}

// One pixel of any format as a double: for the rare single-pixel reads
// (bad-pixel repair), not for loops over a frame.
inline double load_pixel_as_double(PixelFormat f, const std::byte* row, std::size_t i) {
  switch (f) {
    case PixelFormat::kU8: return load_pixel<std::uint8_t>(row, i);
    case PixelFormat::kU16: return load_pixel<std::uint16_t>(row, i);
    case PixelFormat::kU32: return load_pixel<std::uint32_t>(row, i);
    case PixelFormat::kF32: return load_pixel<float>(row, i);
  }
  return 0.0;
}

}  // namespace slopecast::core

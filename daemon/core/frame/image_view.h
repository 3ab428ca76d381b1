// Non-owning views of pixel data.
//
// Coordinate convention (used everywhere in slopecast): pixels are 0-based,
// x is the column and y the row; pixel (x, y) covers [x-1/2, x+1/2] x
// [y-1/2, y+1/2], so a position (x, y) = (3.0, 4.0) is the centre of the pixel
// in column 3, row 4.
#pragma once

#include <cstddef>
#include <span>

#include "daemon/core/frame/pixel_format.h"

namespace slopecast::core {

// A camera frame as it arrived: raw bytes, row-major, little-endian. The view
// does not own the bytes (in the daemon they belong to the ZeroMQ message).
// Precondition (checked by check_frame() before a view is made):
// data.size() >= row_stride_bytes * height and row_stride_bytes >= width *
// bytes_per_pixel(format).
struct ImageView {
  std::span<const std::byte> data;
  int width = 0;                    // columns (x), px
  int height = 0;                   // rows (y), px
  std::size_t row_stride_bytes = 0; // bytes from one row start to the next
  PixelFormat format = PixelFormat::kU16;

  const std::byte* row(int y) const {
    return data.data() + static_cast<std::size_t>(y) * row_stride_bytes;
  }
};

// A corrected window: float pixels, row-major, rows `stride` floats apart.
// Window-local coordinates follow the same convention as the frame: the
// first pixel's centre is (0, 0).
struct WindowView {
  const float* data = nullptr;
  int width = 0;   // px
  int height = 0;  // px
  int stride = 0;  // floats from one row start to the next, >= width

};

// A horizontal strip of n_windows equal windows side by side (one row of
// subapertures), corrected, row-major with rows `stride` floats apart.
// Window k covers strip columns k*window_width ... (k+1)*window_width - 1.
struct StripView {
  const float* data = nullptr;
  int window_width = 0;  // px
  int height = 0;        // px
  int n_windows = 0;
  int stride = 0;        // floats, >= n_windows * window_width

  int width() const { return n_windows * window_width; }
  WindowView window(int k) const { return {data + static_cast<std::size_t>(k) * window_width, window_width, height, stride}; }
};

}  // namespace slopecast::core

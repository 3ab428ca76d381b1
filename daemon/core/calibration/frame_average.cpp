#include "daemon/core/calibration/frame_average.h"

#include <cassert>
#include <cmath>
#include <cstdint>

namespace slopecast::core {

FrameAverager::FrameAverager(int width, int height)
    : width_(width), height_(height),
      mean_(static_cast<std::size_t>(width) * height, 0.0),
      m2_(static_cast<std::size_t>(width) * height, 0.0) {}

namespace {
template <typename T>
void add_typed(const ImageView& image, int n, double* mean, double* m2) {
  for (int y = 0; y < image.height; ++y) {
    const std::byte* row = image.row(y);
    double* mu = mean + static_cast<std::size_t>(y) * image.width;
    double* s = m2 + static_cast<std::size_t>(y) * image.width;
    for (int x = 0; x < image.width; ++x) {
      const double v = static_cast<double>(load_pixel<T>(row, x));
      const double d = v - mu[x];
      mu[x] += d / n;
      s[x] += d * (v - mu[x]);
    }
  }
}
}  // namespace

void FrameAverager::add(const ImageView& image) {
  assert(image.width == width_ && image.height == height_);
  ++frames_;
  switch (image.format) {
    case PixelFormat::kU8: add_typed<std::uint8_t>(image, frames_, mean_.data(), m2_.data()); break;
    case PixelFormat::kU16: add_typed<std::uint16_t>(image, frames_, mean_.data(), m2_.data()); break;
    case PixelFormat::kU32: add_typed<std::uint32_t>(image, frames_, mean_.data(), m2_.data()); break;
    case PixelFormat::kF32: add_typed<float>(image, frames_, mean_.data(), m2_.data()); break;
  }
}

std::vector<float> FrameAverager::mean() const { return {mean_.begin(), mean_.end()}; }

std::vector<float> FrameAverager::stddev() const {
  std::vector<float> out(m2_.size(), 0.0f);
  if (frames_ < 2) return out;
  for (std::size_t k = 0; k < m2_.size(); ++k) out[k] = static_cast<float>(std::sqrt(m2_[k] / (frames_ - 1)));
  return out;
}

}  // namespace slopecast::core

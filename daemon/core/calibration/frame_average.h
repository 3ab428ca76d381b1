// Mean and temporal spread of a stack of frames, pixel by pixel: the dark,
// the flat's light, the image registration works on.
//
// Welford's running update (Welford 1962, "Note on a method for calculating
// corrected sums of squares and products", Technometrics 4(3)) per pixel
// in double: mean_n = mean_{n-1} + (v - mean_{n-1}) / n, m2 += (v -
// mean_{n-1})(v - mean_n); exact to rounding for any number of frames,
// where a plain sum of squares of 32-bit pixels would lose digits.
#pragma once

#include <vector>

#include "daemon/core/frame/image_view.h"

namespace slopecast::core {

class FrameAverager {
 public:
  // Allocates the per-pixel sums (2 doubles per pixel).
  FrameAverager(int width, int height);
  // Precondition: image is width x height. Allocation-free.
  void add(const ImageView& image);
  int frames() const { return frames_; }
  int width() const { return width_; }
  int height() const { return height_; }
  // Arithmetic mean of the frames added, per pixel (row-major).
  std::vector<float> mean() const;
  // Sample standard deviation (n - 1 in the denominator) per pixel; zeros
  // with fewer than two frames.
  std::vector<float> stddev() const;

 private:
  int width_, height_, frames_ = 0;
  std::vector<double> mean_, m2_;
};

}  // namespace slopecast::core

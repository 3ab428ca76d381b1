// Copying a box of a raw frame (in the pipeline: one row of subapertures)
// into float pixels, correcting it on the way: corrected = (raw - dark) *
// gain, gain = 1 / flat (0 at a bad pixel, which the pipeline then fills).
//
// This is the only place raw pixels are read. Each grid pixel is read once
// per frame, and the corrected strip stays hot in L1 cache for the centroider
// that follows.
#pragma once

#include <span>

#include "daemon/core/frame/image_view.h"

namespace slopecast::core {

// Box of the frame to copy: columns x0 .. x0+width-1, rows y0 .. y0+height-1.
struct Box {
  int x0 = 0;
  int y0 = 0;
  int width = 0;
  int height = 0;
};

// Writes box of image, minus dark and times gain where given, to out
// (row-major, stride box.width floats). When raw_column_max is not empty it
// also receives, per box column, the largest raw pixel value (before the
// dark) among pixels whose gain is not 0, for the saturation check.
// Preconditions: box lies inside image; out.size() >= box.width*box.height;
// dark and gain are each empty or have image.width*image.height values
// (row-major); raw_column_max is empty or has >= box.width entries.
// Allocation-free.
void correct_box(const ImageView& image, std::span<const float> dark, const Box& box,
                 std::span<float> out, std::span<float> raw_column_max = {}, std::span<const float> gain = {});

}  // namespace slopecast::core

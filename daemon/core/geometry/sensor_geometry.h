// The camera and the lenslet grid laid over it.
//
// Subaperture (ix, iy) covers columns origin_x_px + ix*pitch_px ...
// origin_x_px + (ix+1)*pitch_px - 1 and rows likewise. Its index is
// iy*n_subap_x + ix. Its zero point, until reference slopes replace it, is the
// box centre origin_x_px + (ix + 1/2)*pitch_px - 1/2 (and likewise in y), in
// the pixel convention of image_view.h.
#pragma once

#include <string>

#include "daemon/core/frame/pixel_format.h"

namespace slopecast::core {

// What every accepted frame must look like.
struct CameraSpec {
  int width_px = 0;
  int height_px = 0;
  PixelFormat format = PixelFormat::kU16;
};

struct LensletGrid {
  int n_subap_x = 0;    // subapertures across
  int n_subap_y = 0;    // subapertures down
  int pitch_px = 0;     // box side, px (square boxes)
  int origin_x_px = 0;  // column of the first box's first pixel
  int origin_y_px = 0;  // row of the first box's first pixel

  int count() const { return n_subap_x * n_subap_y; }
  int box_x0(int ix) const { return origin_x_px + ix * pitch_px; }
  int box_y0(int iy) const { return origin_y_px + iy * pitch_px; }
  // Zero point of subaperture (ix, iy) in frame pixel coordinates.
  double zero_x(int ix) const { return origin_x_px + (ix + 0.5) * pitch_px - 0.5; }
  double zero_y(int iy) const { return origin_y_px + (iy + 0.5) * pitch_px - 0.5; }
};

// Empty when the camera is usable; otherwise a sentence saying what is wrong.
std::string validate(const CameraSpec& camera);
// Empty when the grid is usable on this camera (every box inside the frame);
// otherwise a sentence naming the offending value.
std::string validate(const LensletGrid& grid, const CameraSpec& camera);

}  // namespace slopecast::core

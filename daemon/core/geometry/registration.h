// Registration: where the lenslet array's spots fall on the camera, found
// from an image of a flat (reference) wavefront, and the subaperture layout
// laid from it.
//
// Model. The spot of lenslet (i, j) sits at
//
//   x = ox + c i - d j,   y = oy + d i + c j,   c = pitch cos t, d = pitch sin t
//
// a square lattice of pitch `pitch` (px, any real number) turned by t (a
// positive t turns +x toward +y, the frame convention of image_view.h).
// The model is linear in (ox, oy, c, d), so once every spot has its (i, j)
// the fit is ordinary linear least squares (Eigen); pitch = hypot(c, d),
// t = atan2(d, c).
//
// Steps. (1) Spots: local maxima above the image median plus detect_snr
// times its robust noise (1.4826 MAD), at least min_peak_fraction of the
// median candidate peak, none closer than 3 px to a brighter one; each one
// centred by a 5 x 5 centre of gravity. (2) First guess: the median
// nearest-neighbour distance is the pitch and the median of their angles
// folded into [-45, 45) degrees the rotation. (3) Indices, growing from the
// spot nearest the pattern's middle: spots within 4, 8, 16 ... pitches get
// the nearest lattice index under the current fit, then the fit is redone,
// so that a few per mille of pitch error never mis-counts a far spot. (4)
// Refinement: each spot re-centred (twice) by a centre of gravity over a
// window of side ~ pitch - 1 on it, median background removed; then the fit
// redone without spots further than max(4 x 1.4826 MAD, 0.1 px) from
// their lattice point (a dead pixel, a damaged lenslet, a stray reflection)
// until no more are rejected.
//
// The layout: n_x x n_y cells spanning the indices of the spots found;
// each cell's box is box_px square, centred (to the nearest pixel) on its
// lattice point, and its reference point is the lattice point itself. The
// valid map holds every cell with a detected spot (an outlier of the fit
// included: its offset is what reference slopes are for) whose box fits
// the frame; a box that would leave the frame is clamped inside and left
// out of the map.
#pragma once

#include <cstdint>
#include <span>
#include <string>
#include <variant>
#include <vector>

#include "daemon/core/geometry/sensor_geometry.h"
#include "daemon/core/geometry/subaperture_layout.h"

namespace slopecast::core {

struct RegistrationSettings {
  // Box side of the laid layout, px; 0: floor(pitch).
  int box_px = 0;
  double detect_snr = 8.0;
  double min_peak_fraction = 0.2;
};

struct LatticeFit {
  double pitch_px = 0.0;
  double rotation_deg = 0.0;
  // The lattice point of the layout's cell (0, 0) (its top-left cell).
  double origin_x_px = 0.0;
  double origin_y_px = 0.0;
  double residual_rms_px = 0.0;  // rms distance of the kept spots from their lattice points
  int spots_found = 0;           // detected
  int spots_used = 0;            // kept by the fit
};

struct Registration {
  LatticeFit fit;
  LensletGrid grid;  // shape n_x x n_y and box side (pitch_px); origin unused
  std::vector<SubapertureBox> layout;
  std::vector<std::uint8_t> valid_map;  // 1 where a spot was detected and the box fits unclamped
};

std::string validate(const RegistrationSettings& s);

// image: row-major, width x height, background-level float pixels (a dark
// subtracted or not; the median is removed). A sentence instead of a result
// when the image does not hold a lattice of at least 3 x 3 spots.
std::variant<Registration, std::string> register_lattice(std::span<const float> image, int width, int height,
                                                         const RegistrationSettings& settings);

}  // namespace slopecast::core

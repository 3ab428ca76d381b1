// The subapertures as data: one axis-aligned pixel box and one reference
// point per subaperture, in index order.
//
// A regular LensletGrid is one way to produce the table (regular_layout());
// registration on a spot image is another (geometry/registration.h); a
// table written by the user (CSV or FITS, daemon/io/calibration_set.h) is a
// third. Whatever made it, the table keeps the grid's shape (n_subap_x x
// n_subap_y, index iy*n_subap_x + ix) so that consumers can reshape the
// published arrays, and every box has the grid's side (pitch_px): the
// centroiders are built for one box size.
//
// The reference point is where the spot of a flat (reference) wavefront
// sits, frame pixel coordinates (image_view.h). The published slope of
// subaperture i is its centroid minus that point (minus the reference
// slopes when they are set, pipeline.h).
#pragma once

#include <string>
#include <vector>

#include "daemon/core/geometry/sensor_geometry.h"

namespace slopecast::core {

struct SubapertureBox {
  int x0 = 0;       // first column
  int y0 = 0;       // first row
  int width = 0;    // px
  int height = 0;   // px
  double ref_x = 0.0;  // reference point, frame px
  double ref_y = 0.0;

  friend bool operator==(const SubapertureBox&, const SubapertureBox&) = default;
};

// The grid's boxes with their centres as reference points (the geometry
// slopecast used before layouts were data).
std::vector<SubapertureBox> regular_layout(const LensletGrid& grid);

// Empty when `boxes` can serve `grid`'s shape on `camera`: one box per
// subaperture, each pitch_px square, inside the frame, with a finite
// reference point; otherwise a sentence naming the first offending box.
std::string validate_layout(const std::vector<SubapertureBox>& boxes, const LensletGrid& grid,
                            const CameraSpec& camera);

// Consecutive boxes (in index order) on the same rows and side by side: the
// pipeline reads each run as one strip. A regular grid has one run per row
// of subapertures; a rotated or gapped layout has shorter runs (down to one
// box each, the general path).
struct BoxRun {
  int first = 0;  // index of the first box
  int count = 0;  // boxes in the run
};
std::vector<BoxRun> box_runs(const std::vector<SubapertureBox>& boxes);

}  // namespace slopecast::core

// A lenslet grid's worth of spots with known offsets: what `slopecast sim`
// puts in each frame, and the truth it writes beside it.
//
// Each subaperture (ix, iy) gets one pixel-integrated Gaussian spot at its
// zero point (the box centre, daemon/core/geometry/sensor_geometry.h) plus an offset
// (dx, dy) drawn uniformly from [-max_offset_px, max_offset_px], fresh for
// every frame. The spot is clipped to its own box.
#pragma once

#include <random>
#include <string>
#include <vector>

#include "daemon/core/geometry/sensor_geometry.h"

namespace slopecast::sim {

struct SpotFieldSettings {
  core::LensletGrid grid;
  double spot_sigma_px = 0.9;       // rms width of each spot, px
  double photons_per_spot = 5000;   // expected photo-electrons per spot
  double max_offset_px = 1.5;       // offsets drawn from [-max, max], px
};

std::string validate(const SpotFieldSettings& s);

struct SpotOffsets {
  std::vector<double> dx_px;  // per subaperture, index iy*n_x + ix
  std::vector<double> dy_px;
};

// Draws a fresh set of offsets.
SpotOffsets draw_offsets(const SpotFieldSettings& s, std::mt19937_64& rng);

// Expected photo-electrons per pixel for the given offsets, row-major,
// width x height (the image must contain the grid).
std::vector<double> render_spot_field(const SpotFieldSettings& s, const SpotOffsets& offsets,
                                      int width, int height);

}  // namespace slopecast::sim

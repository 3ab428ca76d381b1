// The spots of a real lenslet array on a camera: a lattice of non-integer
// pitch, turned by a small angle, seen through a circular pupil with a
// central obstruction, with dead and over-bright lenslets. What
// registration (daemon/core/geometry/registration.h) has to cope with, and
// what the calibration demo and tests draw.
//
// Lenslet (i, j), i across and j down, both from 0, images its spot at
//
//   x = origin_x + pitch (i cos t - j sin t) + tilt_x
//   y = origin_y + pitch (i sin t + j cos t) + tilt_y,      t = rotation
//
// (frame px, image_view.h: a positive rotation turns +x toward +y). Its
// light is photons_per_spot times the fraction of the lenslet's square
// (side pitch, centred on the lattice point) inside the pupil annulus,
// sampled on a 16 x 16 grid; lenslets under 5 % lit are dark.
#pragma once

#include <string>
#include <utility>
#include <vector>

namespace slopecast::sim {

struct LatticeFieldSettings {
  int width_px = 400;
  int height_px = 400;
  int lenslets_x = 36;
  int lenslets_y = 36;
  double pitch_px = 10.37;
  double rotation_deg = 0.4;
  double origin_x_px = 15.0;   // spot of lenslet (0, 0) for a flat wavefront
  double origin_y_px = 14.0;
  double pupil_x_px = 200.0;   // pupil centre on the camera
  double pupil_y_px = 200.0;
  double pupil_diameter_px = 360.0;
  double obstruction = 0.3;    // central obstruction, fraction of the diameter
  double spot_sigma_px = 1.1;
  double photons_per_spot = 20000;
  double background_e = 20;    // uniform sky/stray light per pixel, electrons
  double tilt_x_px = 0.0;      // the same displacement for every spot (a wavefront tilt)
  double tilt_y_px = 0.0;
  std::vector<std::pair<int, int>> dead;    // lenslets (i, j) that give no light
  std::vector<std::pair<int, int>> bright;  // lenslets (i, j) given bright_factor times the light
  double bright_factor = 10.0;
};

std::string validate(const LatticeFieldSettings& s);

struct LatticeSpot {
  int i = 0, j = 0;
  double x = 0.0, y = 0.0;  // true centre, frame px
  double photons = 0.0;     // expected photo-electrons
};

// The lit spots, and the expected photo-electrons per pixel (row-major,
// width x height); each spot is drawn out to 6 sigma, clipped to the frame.
struct LatticeField {
  std::vector<LatticeSpot> spots;
  std::vector<double> image_e;
};
LatticeField render_lattice_field(const LatticeFieldSettings& s);

}  // namespace slopecast::sim

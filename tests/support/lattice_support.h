// Noisy frames of a turned, non-integer-pitch lenslet lattice behind an
// obstructed pupil (client/sim/lattice_field.h through the detector model),
// for registration and calibration tests.
#pragma once

#include <cstdint>
#include <random>
#include <vector>

#include "client/sim/detector_model.h"
#include "client/sim/lattice_field.h"

namespace slopecast::testing {

// The bench the calibration tests share: 36 x 36 lenslets of 10.37 px,
// turned 0.4 degrees, a 350 px pupil with a 30 % obstruction, three dead
// lenslets inside the pupil and two bright enough to saturate.
inline sim::LatticeFieldSettings tilted_bench() {
  sim::LatticeFieldSettings s;
  s.width_px = 400;
  s.height_px = 400;
  s.lenslets_x = 36;
  s.lenslets_y = 36;
  s.pitch_px = 10.37;
  s.rotation_deg = 0.4;
  s.origin_x_px = 16.3;
  s.origin_y_px = 12.6;
  s.pupil_x_px = 201.3;
  s.pupil_y_px = 198.7;
  s.pupil_diameter_px = 350.0;
  s.obstruction = 0.3;
  s.spot_sigma_px = 1.1;
  s.photons_per_spot = 20000;
  s.background_e = 20;
  s.dead = {{5, 17}, {30, 20}, {18, 4}};
  s.bright = {{10, 10}, {25, 27}};
  s.bright_factor = 60.0;  // 1.2 M photons: the peak pixel passes 65535 ADU wherever the spot falls
  return s;
}

inline sim::DetectorModel bench_detector() {
  sim::DetectorModel d;
  d.read_noise_e = 3.0;
  d.gain_e_per_adu = 1.0;
  d.bias_adu = 100.0;
  d.full_scale_adu = 65535.0;
  return d;
}

// One exposure of the field as u16 pixels.
inline std::vector<std::uint16_t> expose_u16(const sim::LatticeField& f, const sim::DetectorModel& d,
                                             std::mt19937_64& rng) {
  std::vector<std::uint16_t> px(f.image_e.size());
  sim::expose(f.image_e, d, rng, px);
  return px;
}

}  // namespace slopecast::testing

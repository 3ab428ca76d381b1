// Slopes in physical units. The pipeline measures spot displacements in
// detector pixels; a consumer may want them as
//
//   wavefront tilt, rad       theta = s * p / f
//   wavefront difference, nm  dW = theta * d             (across one subaperture)
//   angle on the sky, arcsec  alpha = s * plate_scale
//
// s the displacement (px), p the detector pixel size, f the lenslet focal
// length, d the lenslet pitch (all in metres in the formulas above; the
// settings below take micrometres and millimetres), plate_scale in arcsec
// per px on the sky. The first is the Shack-Hartmann relation between spot
// shift and mean wavefront gradient over the lenslet (small angles; e.g.
// Hardy 1998, "Adaptive Optics for Astronomical Telescopes", ch. 5); the
// second multiplies the gradient by the lenslet width.
#pragma once

#include <string>
#include <string_view>
#include <variant>

namespace slopecast::core {

enum class SlopeUnit { kPx, kRad, kNm, kArcsec };

std::string_view slope_unit_name(SlopeUnit u);  // "px", "rad", "nm", "arcsec"

struct SlopeOptics {
  double pixel_size_um = 0.0;              // detector pixel pitch, um
  double lenslet_focal_length_mm = 0.0;    // lenslet focal length, mm
  double lenslet_pitch_um = 0.0;           // lenslet pitch, um
  double plate_scale_arcsec_per_px = 0.0;  // on the sky
};

// Multiplier from px to `unit`; a sentence naming the missing optics value
// instead.
std::variant<double, std::string> units_per_px(SlopeUnit unit, const SlopeOptics& optics);

}  // namespace slopecast::core

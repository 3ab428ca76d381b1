// Which subapertures take part: the valid map, one byte per subaperture
// (1 in, 0 out; out is flagged kFlagMasked by the pipeline).
#pragma once

#include <cstdint>
#include <span>
#include <string>
#include <vector>

#include "daemon/core/geometry/subaperture_layout.h"

namespace slopecast::core {

// From illumination: in where the mean flux (over the frames of an
// acquisition) is at least `fraction` of the median of the positive mean
// fluxes. A dark or vignetted lenslet falls below it; the median is
// carried by the fully lit ones whenever more than half are lit.
// Precondition: 0 < fraction <= 1 (validate_fraction).
std::vector<std::uint8_t> valid_from_flux(std::span<const float> mean_flux, double fraction);
std::string validate_flux_fraction(double fraction);

// From a pupil description, frame px: an annulus of outer diameter
// diameter_px and inner diameter obstruction * diameter_px about
// (centre_x_px, centre_y_px).
struct PupilSpec {
  double centre_x_px = 0.0;
  double centre_y_px = 0.0;
  double diameter_px = 0.0;
  double obstruction = 0.0;  // 0 <= obstruction < 1
};
std::string validate(const PupilSpec& p);

// In where at least min_area_fraction of the subaperture's box lies inside
// the annulus (the box sampled at 16 x 16 points).
std::vector<std::uint8_t> valid_from_pupil(const std::vector<SubapertureBox>& boxes, const PupilSpec& pupil,
                                           double min_area_fraction = 0.5);

// Both maps' "in" (an empty map is all in).
std::vector<std::uint8_t> combine_maps(std::span<const std::uint8_t> a, std::span<const std::uint8_t> b);

}  // namespace slopecast::core

// The flat field: each pixel's response relative to the mean, from frames
// of uniform illumination.
//
//   flat = (mean of the flat frames - dark) / its mean over the pupil
//
// "The pupil" is every pixel of a subaperture box in the valid map (all
// boxes when the map is empty); pixels outside it get 1 (the flat says
// nothing there). The pipeline then measures (raw - dark) / flat.
#pragma once

#include <cstdint>
#include <span>
#include <string>
#include <variant>
#include <vector>

#include "daemon/core/geometry/subaperture_layout.h"

namespace slopecast::core {

// mean: the flat frames' mean; dark: per pixel or empty. A sentence instead
// when the pupil holds no light, or a pupil pixel's response is not
// positive (a dead pixel: mark it bad instead) -- the first one is named.
std::variant<std::vector<float>, std::string> normalised_flat(std::span<const float> mean,
                                                              std::span<const float> dark, int width, int height,
                                                              const std::vector<SubapertureBox>& boxes,
                                                              std::span<const std::uint8_t> valid_map,
                                                              std::span<const std::uint8_t> bad_pixels = {});

}  // namespace slopecast::core

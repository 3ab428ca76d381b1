// A bank of distinct simulated frames with their truth.
//
// Rendering and exposing a frame (erf per row/column, a Poisson and a
// Gaussian draw per pixel) costs more than a kHz camera period on one core,
// so the simulator renders `count` distinct frames up front and cycles
// through them; frame seq k shows bank entry k % count. Truth is exact for
// every entry.
#pragma once

#include <cstdint>
#include <random>
#include <vector>

#include "client/sim/detector_model.h"
#include "client/sim/spot_field.h"

namespace slopecast::sim {

struct FrameBank {
  int width = 0;
  int height = 0;
  std::vector<std::vector<std::uint16_t>> frames;  // row-major u16, width*height each
  std::vector<SpotOffsets> truth;                  // offsets rendered in frames[i]
};

// Precondition: validate(field) and validate(detector) are empty; the grid
// fits in width x height.
FrameBank make_frame_bank(const SpotFieldSettings& field, const DetectorModel& detector, int width,
                          int height, int count, std::uint64_t seed);

// The mean of n dark exposures (no spots): what a bench's dark acquisition
// would produce, in ADU, row-major.
std::vector<float> make_mean_dark(const DetectorModel& detector, int width, int height, int n,
                                  std::uint64_t seed);

}  // namespace slopecast::sim

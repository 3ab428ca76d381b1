// Simulated camera frames one at a time, with their truth: the one place a
// scene becomes exposed pixels. The frame banks (frame_bank.h) keep what a
// maker makes; `slopecast eval` measures each frame as it is made, so a run
// of any length needs the memory of one frame.
//
// Frames must be asked for in order (k = 0, 1, 2 ...): the noise comes from
// one random stream, so the same seed gives the same frames.
#pragma once

#include <cstdint>
#include <functional>
#include <random>
#include <vector>

#include "client/sim/detector_model.h"
#include "client/sim/lenslet_imaging.h"
#include "client/sim/spot_field.h"
#include "client/sim/turbulence_sim.h"
#include "daemon/core/geometry/sensor_geometry.h"

namespace slopecast::sim {

class FrameMaker {
 public:
  virtual ~FrameMaker() = default;
  // Frame k: pixels of the camera's format, packed little-endian, and the
  // truth (illuminated is all 1 for scenes without a pupil).
  virtual void make(std::uint64_t k, std::vector<std::byte>& pixels, SubapertureTruth& truth) = 0;
};

// Spots (spot_field.h) on background_e_per_px of diffuse light. Offsets are
// drawn at random for every frame, or, with `offsets`, given per frame
// (a response sweep: the same shift in every subaperture, say).
class SpotFrameMaker : public FrameMaker {
 public:
  using OffsetRule = std::function<SpotOffsets(std::uint64_t k)>;
  // Preconditions as make_frame_bank().
  SpotFrameMaker(const SpotFieldSettings& field, const DetectorModel& detector, const core::CameraSpec& camera,
                 double background_e_per_px, std::uint64_t seed, OffsetRule offsets = {});
  void make(std::uint64_t k, std::vector<std::byte>& pixels, SubapertureTruth& truth) override;

 private:
  SpotFieldSettings field_;
  DetectorModel detector_;
  core::CameraSpec camera_;
  double background_;
  std::mt19937_64 rng_;
  OffsetRule rule_;
  std::vector<double> adu_;
};

// A turbulence simulation (turbulence_sim.h) exposed through the detector.
class TurbulenceFrameMaker : public FrameMaker {
 public:
  TurbulenceFrameMaker(TurbulenceSim& simulator, const DetectorModel& detector, const core::CameraSpec& camera,
                       std::uint64_t seed);
  void make(std::uint64_t k, std::vector<std::byte>& pixels, SubapertureTruth& truth) override;

 private:
  TurbulenceSim& sim_;
  DetectorModel detector_;
  core::CameraSpec camera_;
  std::mt19937_64 rng_;
  std::vector<double> expected_, adu_;
};

}  // namespace slopecast::sim

// A bank of distinct simulated frames with their truth.
//
// Rendering and exposing a frame (erf per row/column, a Poisson and a
// Gaussian draw per pixel) costs more than a kHz camera period on one core,
// so the simulator renders `count` distinct frames up front and cycles
// through them; frame seq k shows bank entry k % count. Truth is exact for
// every entry.
#pragma once

#include <cstdint>
#include <functional>
#include <random>
#include <vector>

#include "client/sim/detector_model.h"
#include "client/sim/spot_field.h"
#include "client/sim/turbulence_sim.h"
#include "daemon/core/geometry/sensor_geometry.h"

namespace slopecast::sim {

struct FrameBank {
  core::CameraSpec camera;
  std::vector<std::vector<std::byte>> frames;  // row-major pixels of camera.format, tightly packed
  std::vector<SpotOffsets> truth;              // offsets rendered in frames[i]
  std::vector<std::vector<double>> illuminated;  // turbulence scenes: fraction of each subaperture lit
};

// Called between frames; returning false stops the work early (Ctrl-C).
using KeepGoing = std::function<bool()>;

// Spots plus background_e_per_px of diffuse light on every pixel (sky,
// scattered light), exposed through the detector. Stops early, returning
// the frames made so far, when keep_going() turns false.
// Precondition: validate(field) and validate(detector) are empty; the grid
// fits the camera.
FrameBank make_frame_bank(const SpotFieldSettings& field, const DetectorModel& detector,
                          const core::CameraSpec& camera, double background_e_per_px, int count,
                          std::uint64_t seed, const KeepGoing& keep_going = [] { return true; });

// `count` exposures of one fixed scene (expected photo-electrons per pixel,
// row-major, camera-sized): a static lattice of spots, uniform light for a
// flat, or nothing for a dark. truth stays empty. Precondition:
// validate(detector) is empty.
FrameBank make_static_bank(const std::vector<double>& expected_e, const DetectorModel& detector,
                           const core::CameraSpec& camera, int count, std::uint64_t seed,
                           const KeepGoing& keep_going = [] { return true; });

// Frames 0..count-1 of a turbulence simulation (frame k at time k /
// rate_hz), exposed through the detector, with their truth.
FrameBank make_turbulence_bank(TurbulenceSim& simulator, const DetectorModel& detector,
                               const core::CameraSpec& camera, int count, std::uint64_t seed,
                               const KeepGoing& keep_going = [] { return true; });

// The mean of n dark exposures (no light at all): what a bench's dark
// acquisition would produce, in ADU, row-major. Empty if stopped early.
std::vector<float> make_mean_dark(const DetectorModel& detector, int width, int height, int n,
                                  std::uint64_t seed, const KeepGoing& keep_going = [] { return true; });

}  // namespace slopecast::sim

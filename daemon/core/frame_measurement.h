// The result of measuring one frame: per-subaperture arrays plus frame
// statistics. Sized once by Pipeline (at configuration time) and reused for
// every frame, so measuring a frame does not allocate.
#pragma once

#include <cstdint>
#include <vector>

namespace slopecast::core {

// Bits of FrameMeasurement::flags; 0 means valid. Values match
// slopecast.v1.SubapertureFlag.
enum SubapertureFlag : std::uint32_t {
  kFlagNone = 0,
  kFlagLowFlux = 1u << 0,    // flux below PipelineSettings::min_flux_adu, or not positive
  kFlagNonFinite = 1u << 1,  // a NaN/infinite pixel in the box, or a non-finite centroid
};

struct FrameMeasurement {
  // Per subaperture, index iy*n_subap_x + ix. Slopes in px from the zero
  // point, positive toward larger x / y; exactly 0 where invalid.
  std::vector<float> slope_x_px;
  std::vector<float> slope_y_px;
  std::vector<float> flux_adu;  // sum of corrected pixels in the box
  std::vector<float> peak_adu;  // brightest corrected pixel in the box
  std::vector<std::uint32_t> flags;  // SubapertureFlag bits

  int n_valid = 0;
  float slope_rms_x_px = 0.0f;  // rms over valid subapertures
  float slope_rms_y_px = 0.0f;
  float mean_flux_adu = 0.0f;   // mean over valid subapertures

  void resize(int n) {
    slope_x_px.assign(n, 0.0f);
    slope_y_px.assign(n, 0.0f);
    flux_adu.assign(n, 0.0f);
    peak_adu.assign(n, 0.0f);
    flags.assign(n, kFlagNone);
  }
  int size() const { return static_cast<int>(flags.size()); }
};

}  // namespace slopecast::core

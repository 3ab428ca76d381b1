// Averages of the measurements over an acquisition: the reference slopes
// (mean slope of each subaperture while the reference source is on) and
// the mean flux (for the valid map from illumination).
#pragma once

#include <vector>

#include "daemon/core/pipeline/frame_measurement.h"

namespace slopecast::core {

class SlopeAverager {
 public:
  explicit SlopeAverager(int subapertures);
  // Allocation-free. Slopes count only where the subaperture is valid
  // (flags 0); flux counts in every frame.
  void add(const FrameMeasurement& m);
  int frames() const { return frames_; }

  struct Result {
    std::vector<float> slope_x_px, slope_y_px;  // mean over the frames it was valid in; 0 if never
    std::vector<int> valid_frames;              // frames it was valid in
    std::vector<float> mean_flux_adu;           // over every frame
    int seldom_valid = 0;  // subapertures valid in fewer than half the frames (and more than none)
    int never_valid = 0;
  };
  Result result() const;

 private:
  int frames_ = 0;
  std::vector<double> sx_, sy_, flux_;
  std::vector<int> n_;
};

}  // namespace slopecast::core

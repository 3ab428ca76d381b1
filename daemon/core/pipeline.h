// One frame in, one FrameMeasurement out: the pure heart of the daemon.
//
//   for each row of subapertures: correct the strip of boxes (raw - dark)
//   -> centroid every box -> slope = position - zero point -> validity;
//   then frame statistics.
//
// Working a strip at a time reads each pixel of the grid once, keeps the
// corrected strip (pitch x grid width floats) in L1 cache, and gives the
// inner loops full grid-width rows to vectorise over.
//
// Call order: construct with settings that passed validate() (the
// constructor allocates every buffer), then call measure() once per frame;
// measure() does not allocate, lock, log or touch a clock. A Pipeline is not
// shared between threads; the daemon swaps whole pipelines between frames.
#pragma once

#include <memory>
#include <string>
#include <vector>

#include "daemon/core/centroider.h"
#include "daemon/core/frame_measurement.h"
#include "daemon/core/image_view.h"
#include "daemon/core/sensor_geometry.h"

namespace slopecast::core {

struct PipelineSettings {
  CameraSpec camera;
  LensletGrid grid;
  // Dark frame, ADU, row-major camera.width_px * camera.height_px values; empty
  // for none. Subtracted from every frame before centroiding.
  std::vector<float> dark_adu;
  // A subaperture whose corrected flux is below this is invalid, ADU.
  double min_flux_adu = 0.0;
  CentroiderKind centroider = CentroiderKind::kCog;
};

// Empty when settings can build a Pipeline; otherwise what is wrong.
std::string validate(const PipelineSettings& settings);

class Pipeline {
 public:
  // Precondition: validate(settings) is empty.
  explicit Pipeline(PipelineSettings settings);

  const PipelineSettings& settings() const { return settings_; }
  // Returns a FrameMeasurement sized for this pipeline's grid.
  FrameMeasurement make_measurement() const;

  // Precondition: image matches settings().camera (check_frame() passed) and
  // out came from make_measurement().
  void measure(const ImageView& image, FrameMeasurement& out);

 private:
  PipelineSettings settings_;
  std::unique_ptr<Centroider> centroider_;
  std::vector<float> strip_;             // scratch: one corrected row of boxes
  std::vector<SpotEstimate> estimates_;  // scratch: one per box of the strip
};

}  // namespace slopecast::core

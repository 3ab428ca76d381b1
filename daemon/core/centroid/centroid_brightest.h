// Brightest-pixels centre of gravity: keep the N brightest pixels of the
// window, subtract the (N+1)-th brightest value from them, and take the CoG
// of the result (Basden, Myers & Gendron 2012, MNRAS 419, 1628, "Wavefront
// sensing with a brightest pixel selection algorithm"; authors and venue as
// remembered, the title confirmed). It is a thresholded CoG whose threshold
// adapts to the spot so that a fixed number of pixels count, which keeps
// faint-spot noise bounded without a flux-dependent threshold.
//
// Ties at the (N+1)-th value contribute 0 after the subtraction, so fewer than
// N pixels may carry weight; that is the method, not an error.
#pragma once

#include <vector>

#include "daemon/core/centroid/centroider.h"

namespace slopecast::core {

class BrightestCentroider final : public Centroider {
 public:
  // max_pixels: the largest window it will be given, pixels.
  BrightestCentroider(int n_brightest, int max_pixels);
  CentroiderKind kind() const override { return CentroiderKind::kBrightest; }
  // Precondition: n_brightest < window pixels (validate()).
  SpotEstimate measure(const WindowView& window, const WindowContext& context) override;

 private:
  int n_;
  std::vector<float> scratch_;  // a copy of the window for selection
};

}  // namespace slopecast::core

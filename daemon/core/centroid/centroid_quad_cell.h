// Quad-cell: the window is split into left/right and top/bottom halves (a
// 2 x 2 box is four pixels; a larger box is binned to 2 x 2; when the side
// is odd its middle column or row is split where a quadratic through it and
// its neighbours puts the light, exact for a locally quadratic profile), and
//
//   s_x = (I_right - I_left) / (I_right + I_left)
//
// For a Gaussian spot of rms sigma, no gap between the halves and halves
// much larger than the spot, s_x = erf(dx / (sqrt(2) sigma)) exactly, pixel
// integration included (derived: the light right of the split is the
// Gaussian's cumulative distribution; tests/REFERENCES.md R6.3), so
//
//   dx = sqrt(2) sigma erfinv(s_x),   x = box centre + dx
//
// puts the output in pixels. sigma is the spot_sigma_px setting: the gain
// depends on it (small-signal gain ds/dx = sqrt(2/pi)/sigma), so a wrong
// spot width is a gain error, the quad-cell's well-known weakness (Thomas et
// al. 2006). Photon noise var = (pi/2) sigma^2 / N, 1.57 times the CoG's;
// read noise var = 2 pi sigma^2 sigma_e^2 / N^2 for 4 pixels (derived, R6.3).
// |s| = 1 (all the light in one half) has no inverse: the estimate is held
// at the edge of the range erfinv(+-(1 - 1e-6)) and marked failed.
#pragma once

#include <vector>

#include "daemon/core/centroid/centroider.h"

namespace slopecast::core {

// Inverse error function on (-1, 1): Newton steps on std::erf from a
// closed-form first guess, to double precision.
double erfinv(double s);

class QuadCellCentroider final : public Centroider {
 public:
  // max_side: the largest window side it will be given, px.
  QuadCellCentroider(double spot_sigma_px, int max_side) : sigma_(spot_sigma_px), cols_(max_side), rows_(max_side) {}
  CentroiderKind kind() const override { return CentroiderKind::kQuadCell; }
  SpotEstimate measure(const WindowView& window, const WindowContext& context) override;

 private:
  double sigma_;
  std::vector<double> cols_, rows_;  // scratch: column and row sums
};

}  // namespace slopecast::core

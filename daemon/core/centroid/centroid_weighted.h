// Weighted centre of gravity (WCoG) with a Gaussian weight:
//
//   W_i = exp(-((x_i - x_w)^2 + (y_i - y_w)^2) / (2 sigma_w^2))
//   x_raw = sum x_i W_i I_i / sum W_i I_i
//   x = x_w + g (x_raw - x_w),   g = (sigma_s^2 + 1/12 + sigma_w^2) / sigma_w^2
//
// (Nicolle, Fusco, Rousset & Michau 2004, Opt. Lett. 29, 2743; Thomas et al.
// 2006, MNRAS 371, 323). A Gaussian spot of rms sigma_s times a Gaussian
// weight is a Gaussian whose centre moves by sigma_w^2/(sigma_s^2+sigma_w^2)
// of the spot's offset from the weight's centre, so the raw estimate has that
// gain; g undoes it. Pixel integration widens the spot's variance by 1/12
// (derived; tests/REFERENCES.md R6.1). sigma_s is the spot_sigma_px setting:
// a wrong guess leaves a gain error, which is why it is a setting.
//
// The weight sits at the subaperture's zero point (the box centre), or, with
// weight_follows_spot, moves onto the spot: x_w <- x until a step is below
// weight_tolerance_px or weight_iterations have run (then the estimate is
// marked failed). A weight centred on a symmetric spot has no bias, so the
// following estimate stays linear over the whole box, while the fixed one is
// linear only while the spot is within about sigma_w of the centre.
//
// Noise (fixed weight, after the gain correction; derived in the continuum,
// Thomas et al. 2006 give the same in their FWHM/phase form):
//   photons:    var = (sigma_s^2/N) (sigma_s^2+sigma_w^2)^4 / (sigma_w^4 (2 sigma_s^2+sigma_w^2)^2)
//   read noise: var = pi sigma_e^2 (sigma_s^2+sigma_w^2)^4 / (2 N^2 sigma_w^4)
// The read-noise term does not grow with the window, the reason WCoG wins
// with faint spots.
#pragma once

#include <vector>

#include "daemon/core/centroid/centroider.h"

namespace slopecast::core {

class WeightedCentroider final : public Centroider {
 public:
  // max_side: the largest window side it will be given, px.
  WeightedCentroider(const CentroiderSettings& s, int max_side);
  CentroiderKind kind() const override { return CentroiderKind::kWeighted; }
  SpotEstimate measure(const WindowView& window, const WindowContext& context) override;
  // The gain correction g above.
  double gain() const { return gain_; }

 private:
  // One weighted sum with the weight at (xw, yw); false if sum W I <= 0.
  bool weighted_centre(const WindowView& w, double xw, double yw, double& x, double& y);
  double sigma_w_, gain_;
  bool follow_;
  int iterations_;
  double tolerance_;
  std::vector<float> wx_, wy_;  // scratch: the weight along x and along y
};

}  // namespace slopecast::core

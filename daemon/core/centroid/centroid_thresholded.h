// Thresholded centre of gravity (TCoG):
//
//   I'_i = I_i - T  where I_i > T,  0 elsewhere;   x = sum x_i I'_i / sum I'_i
//
// with the threshold subtracted from the pixels above it (Thomas, Fusco,
// Tokovinin, Nicolle, Michau & Rousset 2006, MNRAS 371, 323; the
// minimum-variance threshold is studied by Arines & Ares 2002, Opt. Lett. 27,
// 497). T is either absolute -- ADU above the subtracted background -- or
// relative, a fraction of the corrected window's peak. Pixels of background noise
// below T no longer add read noise with the large lever arm of the window
// edge, which is what makes TCoG beat CoG with faint spots; subtracting T
// keeps the estimate continuous as pixels cross it.
//
// Noise (derived, linear error propagation with the set S of pixels above T
// held fixed): var(x) = sum_{i in S} (x_i - x)^2 var(I_i) / (sum_{i in S} I'_i)^2,
// with var(I_i) = photons + read noise^2; checked by simulation in
// tests/unit/core/centroid_noise_test.cpp.
#pragma once

#include "daemon/core/centroid/centroider.h"

namespace slopecast::core {

class ThresholdedCentroider final : public Centroider {
 public:
  ThresholdedCentroider(ThresholdMode mode, double threshold) : mode_(mode), threshold_(threshold) {}
  CentroiderKind kind() const override { return CentroiderKind::kThresholded; }
  SpotEstimate measure(const WindowView& window, const WindowContext& context) override;

 private:
  ThresholdMode mode_;
  double threshold_;
};

}  // namespace slopecast::core

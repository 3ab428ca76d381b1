// Centre of gravity (CoG) over the whole window:
//
//   x = sum_i x_i I_i / sum_i I_i,   y = sum_i y_i I_i / sum_i I_i
//
// with I_i the corrected pixel values, negative values included (clipping
// them would bias a noisy background). For a Gaussian spot and photon noise
// the variance per axis is (sigma^2 + 1/12)/N_ph for pixel-integrated data
// (Rousset 1999, in Roddier (ed.) "Adaptive Optics in Astronomy", with the
// pixel term derived in tests/REFERENCES.md R1.2); read noise adds
// sigma_e^2 * sum x_i^2 / N_ph^2 (ibid. R1.3).
//
// The pipeline's moment sweep (metrics/window_moments.h) already holds these
// sums, so the CoG costs nothing beyond it.
#pragma once

#include "daemon/core/centroid/centroider.h"

namespace slopecast::core {

class CogCentroider final : public Centroider {
 public:
  CentroiderKind kind() const override { return CentroiderKind::kCog; }
  // located is false when the flux is not positive or the result is not finite.
  SpotEstimate measure(const WindowView& window, const WindowContext& context) override;
};

}  // namespace slopecast::core

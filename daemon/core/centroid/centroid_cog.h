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
#pragma once

#include <vector>

#include "daemon/core/centroid/centroider.h"

namespace slopecast::core {

class CogCentroider final : public Centroider {
 public:
  // max_width: the widest window or strip it will be given, px.
  explicit CogCentroider(int max_width);
  CentroiderKind kind() const override { return CentroiderKind::kCog; }
  // located is false when the flux is not positive or the result is not finite.
  // Precondition: window.width <= max_width.
  SpotEstimate measure(const WindowView& window) override;
  // Precondition: strip.width() <= max_width.
  void measure_strip(const StripView& strip, std::span<SpotEstimate> out) override;

 private:
  // Sums each column over the rows: sum I, sum y*I, max I (scratch).
  void accumulate_columns(const float* data, int width, int height, int stride);
  // Reduces columns [x0, x0+width) of the accumulators to one estimate.
  SpotEstimate reduce(int x0, int width) const;
  std::vector<float> col_sum_, col_y_sum_, col_peak_;  // scratch, one entry per column
};

}  // namespace slopecast::core

// Correlation against a reference image: the shift of the live window that
// best matches the reference, found on an integer grid and refined to
// sub-pixel by interpolation (Löfdahl 2010, A&A 524, A90: metrics CFI, SDF,
// ADF, ADF^2 and the interpolators of peak_interpolation.h). This is the
// method for extended or elongated spots, where a centre of gravity is
// defined but meaningless.
//
// The reference R is one box (pitch x pitch px, normalised to unit sum):
// a pixel-integrated Gaussian of spot_sigma_px, a FITS image, or the mean of
// the valid spots of a live frame. Its central part of side t = pitch - 2 s
// (s = search_px) is the template; for every shift (u, v) in [-s, s]^2
//
//   cc:   C(u, v) = sum_{i, j < t} I(i + s + u, j + s + v) T(i, j)           maximum
//   sdf:  C(u, v) = sum (I(i + s + u, j + s + v) - k(u, v) T(i, j))^2        minimum
//   adf:  C(u, v) = sum |I(...) - k(u, v) T(i, j)|, adf2: the same squared  minimum
//
// over the same t x t overlap for every shift (u, v running 0..2s here),
// which is what OpenCV's matchTemplate computes (TM_CCORR for cc) with the
// window as image and the template as templ; tests compare the maps and the
// integer extremum with it. k(u, v) = sum I / sum T over the overlap brings
// the reference to the live image's brightness at each trial shift, so that
// neither a change of brightness (scintillation, exposure) nor light
// entering and leaving the box with the shift (an extended scene) pulls the
// difference metrics; with k fixed per window an extended scene of 30 %
// contrast read 0.5 px wrong (a whole-box flux ratio off by ~7 %).
//
// Sign: a live spot displaced by +d px (I(x) = R(x - d)) matches at u = +d,
// so the position reported is box centre + (u, v) + sub-pixel offset, and the
// slope is the shift of the live image relative to the reference, positive
// toward larger x / y -- the same convention as the CoG (with a reference
// centred in its box the two agree on a Gaussian spot).
//
// The integer extremum on the edge of the search range cannot be refined
// (the true shift may lie beyond it): the estimate is marked failed. The
// peak contrast |C_ext - C_mean| / max(|C_ext|, |C_mean|), 0..1, over the
// map, is the quality figure: near 1 for a sharp match, near 0 for a
// featureless window.
#pragma once

#include <vector>

#include "daemon/core/centroid/centroider.h"

namespace slopecast::core {

class CorrelationCentroider final : public Centroider {
 public:
  // Precondition: validate(s, pitch_px) is empty.
  CorrelationCentroider(const CentroiderSettings& s, int pitch_px);
  CentroiderKind kind() const override { return CentroiderKind::kCorrelation; }
  SpotEstimate measure(const WindowView& window, const WindowContext& context) override;

  // The map of the last measure(), (2s+1)^2 values, row v + s, column u + s
  // (for tests).
  const std::vector<double>& map() const { return map_; }
  int template_side() const { return t_; }
  // The unscaled template, t x t, row-major.
  const std::vector<float>& template_pixels() const { return template_; }

 private:
  CorrelationMetric metric_;
  PeakInterpolation interpolation_;
  int s_, t_, p_;
  std::vector<float> template_;  // central t x t of the reference
  float template_sum_ = 1.0f;
  std::vector<double> map_;      // scratch: the correlation map
};

}  // namespace slopecast::core

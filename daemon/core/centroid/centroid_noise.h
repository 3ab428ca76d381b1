// The noise a centroid carries, from photon, background and read noise:
// the published formulas behind our noise tests (tests/REFERENCES.md R1,
// R6), evaluated per subaperture from what the pipeline measured.
//
//   CoG, pixel-integrated Gaussian spot of rms sigma_s, N photo-electrons,
//   an n x n box, read noise sigma_e and background b e-/px (after its
//   subtraction, b adds like read noise):
//     var = (sigma_s^2 + 1/12) / N + (sigma_e^2 + b) n^2 (n^2 - 1) / (12 N^2)
//   (Rousset 1999 for the two terms; the 1/12 is the pixel's own spread).
//
//   Weighted CoG, Gaussian weight of rms sigma_w, after its gain correction
//   (Thomas et al. 2006, in our derived form; s2 = sigma_s^2 + 1/12):
//     var = (s2 / N)(s2 + sigma_w^2)^4 / (sigma_w^4 (2 s2 + sigma_w^2)^2)
//         + pi (sigma_e^2 + b)(s2 + sigma_w^2)^4 / (2 N^2 sigma_w^4)
//
// Both per axis, px^2. The other methods have no model here (NaN): their
// noise is published from the slopes' own statistics only.
#pragma once

#include "daemon/core/centroid/centroider_settings.h"

namespace slopecast::core {

struct SpotNoiseInputs {
  double photons_e = 0;           // the spot's flux, e- (flux_adu x gain)
  double background_e_per_px = 0; // e- per pixel removed as background (or sky) before centroiding
  double read_noise_e = 0;        // per pixel, rms
  double spot_sigma_px = 1;       // the spot's rms width (continuum, without the pixel's 1/12)
  int box_px = 0;                 // box side, px
};

// True for the methods with a model here (cog, wcog).
bool has_noise_model(CentroiderKind kind);

// Model variance of one slope, px^2; NaN when the method has no model or
// the flux is not positive.
double centroid_noise_variance(const CentroiderSettings& method, const SpotNoiseInputs& in);

// The Cramer-Rao lower bound on the variance of any unbiased estimate of a
// spot's x position, px^2 (Winick 1986, JOSA A 3, 1809): a pixel-integrated
// Gaussian of rms spot_sigma_px carrying photons_e, on background_e_per_px,
// in a box_px x box_px box, each pixel's count Poisson plus Gaussian read
// noise, the sum taken as Gaussian of variance mean + read_noise^2 (the
// usual approximation, Winick's eq. for a CCD). The Fisher information for
// x is
//   F = sum_pixels (d mu_i / d x0)^2 / (mu_i + b + sigma_e^2),
// mu_i the pixel's expected photo-electrons. The bound depends on where
// the spot sits on the pixel grid; this is 1/F averaged over `phases`
// sub-pixel positions evenly spread over one pixel in x, the spot centred
// in y (an unknown flux, width or y position adds nothing: their
// derivatives are even in x - x0 where d mu/d x0 is odd, so the Fisher
// matrix is block diagonal for a spot centred in the box). NaN when
// photons_e is not positive.
double cramer_rao_variance(const SpotNoiseInputs& in, int phases = 8);

}  // namespace slopecast::core

// The result of measuring one frame: per-subaperture arrays plus frame
// statistics and a frame-level health word. Sized once by Pipeline (at
// configuration time) and reused for every frame, so measuring a frame does
// not allocate.
#pragma once

#include <cstdint>
#include <vector>

namespace slopecast::core {

// Bits of FrameMeasurement::flags, one per reason; 0 means valid. Several
// can be set at once. Values match slopecast.v1.SubapertureFlag.
enum SubapertureFlag : std::uint32_t {
  kFlagNone = 0,
  kFlagLowFlux = 1u << 0,     // background-subtracted flux below min_flux_adu, or not positive
  kFlagNonFinite = 1u << 1,   // a NaN/infinite pixel in the box, or a non-finite centroid
  kFlagLowSnr = 1u << 2,      // flux / its noise below min_snr
  kFlagOutsideBox = 1u << 3,  // the centroid lies outside the subaperture box
  kFlagSaturated = 1u << 4,   // a raw pixel in the box at or above saturation_adu
  kFlagNearEdge = 1u << 5,    // the centroid lies within edge_margin_px of the box edge (light lost outside)
  kFlagLowContrast = 1u << 6, // correlation peak contrast below min_contrast
  kFlagWide = 1u << 7,        // FWHM (larger axis) above max_fwhm_px
  kFlagElongated = 1u << 8,   // ellipticity above max_ellipticity
  kFlagMethodFailed = 1u << 9,// the method placed the spot but does not vouch for it (see SpotEstimate::failed)
  kFlagNarrow = 1u << 10,     // FWHM (larger axis) below min_fwhm_px: a hot pixel or a cosmic ray, not a spot
  kFlagMasked = 1u << 11,     // excluded by the valid map (outside the pupil, vignetted): never valid
  kFlagNegativePixel = 1u << 12,  // a pixel far below the background (> 10 noise rms, deeper than the box's
                                  // whole flux): the box's light cancels, no centroid can be trusted
};

// Bits of FrameMeasurement::health; 0 means a controller may act on the
// frame. Values match slopecast.v1.FrameHealth.
enum FrameHealthBit : std::uint32_t {
  kHealthOk = 0,
  kHealthSaturated = 1u << 0,  // at least one subaperture holds a saturated pixel
  kHealthNoLight = 1u << 1,    // no subaperture has significant light (all low flux / low SNR)
  kHealthFewValid = 1u << 2,   // fewer valid subapertures than min_valid_fraction of those in the valid map
  kHealthNonFinite = 1u << 3,  // a NaN/infinite pixel somewhere in the grid
};

struct FrameMeasurement {
  // Per subaperture, index iy*n_subap_x + ix. Slopes in px from the
  // reference point (minus the reference slopes, when set), positive toward
  // larger x / y; exactly 0 where invalid.
  std::vector<float> slope_x_px;
  std::vector<float> slope_y_px;
  // Sum of corrected pixels in the box: raw - dark - background, ADU.
  std::vector<float> flux_adu;
  // Brightest raw pixel of the box (before dark and background), ADU.
  std::vector<float> peak_adu;
  // Background estimated for the box (median of its border after the dark),
  // ADU per pixel; 0 where background estimation is off.
  std::vector<float> background_adu;
  // flux / its estimated noise (see background.h); 0 where flux <= 0.
  std::vector<float> snr;
  // Spot widths, FWHM px: the method's own (Gaussian fit) or from the
  // window's second moments (metrics/window_moments.h); 0 where undefined.
  std::vector<float> fwhm_x_px;
  std::vector<float> fwhm_y_px;
  // 1 - minor/major axis from the second moments, 0..1.
  std::vector<float> ellipticity;
  // The method's figure of merit (SpotEstimate::quality): correlation peak
  // contrast, Gaussian-fit reduced chi^2; 0 for the others.
  std::vector<float> quality;
  std::vector<std::uint32_t> flags;  // SubapertureFlag bits
  // Each valid slope's variance from the live centroider's noise model
  // (photon, background and read noise; centroid_noise.h), px^2; 0 where
  // not valid or without a model (no camera gain, or a method without one).
  std::vector<float> slope_var_x_px2;
  std::vector<float> slope_var_y_px2;
  // Raw pixels of the box at or above the saturation level; 0 when the
  // check is off (f32 without saturation_adu).
  std::vector<std::uint32_t> saturated_pixels;

  int n_valid = 0;
  int n_saturated = 0;           // subapertures with kFlagSaturated
  float slope_rms_x_px = 0.0f;   // rms over valid subapertures
  float slope_rms_y_px = 0.0f;
  float mean_flux_adu = 0.0f;    // mean over valid subapertures
  float total_flux_adu = 0.0f;   // sum over every subaperture with finite pixels
  float median_fwhm_px = 0.0f;   // median over valid subapertures of (fwhm_x + fwhm_y) / 2
  std::uint32_t health = kHealthOk;  // FrameHealthBit bits

  void resize(int n) {
    for (auto* v : {&slope_x_px, &slope_y_px, &flux_adu, &peak_adu, &background_adu, &snr, &fwhm_x_px,
                    &fwhm_y_px, &ellipticity, &quality, &slope_var_x_px2, &slope_var_y_px2})
      v->assign(n, 0.0f);
    flags.assign(n, kFlagNone);
    saturated_pixels.assign(n, 0);
  }
  int size() const { return static_cast<int>(flags.size()); }
};

}  // namespace slopecast::core

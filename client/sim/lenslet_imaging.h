// Shack-Hartmann lenslet imaging: the spot of each subaperture as the
// Fraunhofer pattern of that subaperture's complex field, integrated over
// the camera's pixels.
//
// The pupil-plane field is sampled n x n times per subaperture (amplitude:
// the pupil mask at each sample's centre; phase: the wavefront, rad). For
// a camera of q pixels per lambda/d, the far field at a position xi (px,
// from the subaperture's zero point, the box centre) is the discrete
// Fourier sum
//   E(xi, eta) = sum_a,b E_ab exp(-2 pi i ((a - (n-1)/2) xi + (b - (n-1)/2) eta) / (n q))
// evaluated straight on the pixel grid, os x os points per pixel (the
// midpoint rule for the integral over the pixel), as two matrix products
// (the "matrix Fourier transform" of Soummer et al., Optics Express 15,
// 15935, 2007). It equals a zero-padded FFT sampled on the same points but
// allows any q and puts the samples where the pixels are. The pattern
// repeats every n q px, so n is chosen with n q >= 2 x the box side: no
// neighbouring replica reaches the box.
//
// Photometry: a fully illuminated subaperture sends `photons` into the whole
// plane; a partly illuminated one its share (sum |E|^2 / n^2). Light that
// falls outside the box is lost, as with a field stop.
//
// Truth: each subaperture's mean phase gradient (mean of the differences
// between neighbouring illuminated samples, the "G-tilt" of the
// subaperture), expressed as the spot shift it causes: g n q / (2 pi) px for
// g rad per sample. For a pure tilt the spot's centroid moves by exactly
// this.
#pragma once

#include <complex>
#include <span>
#include <string>
#include <vector>

#include <Eigen/Dense>

#include "daemon/core/geometry/sensor_geometry.h"

namespace slopecast::sim {

struct LensletOptics {
  double pixels_per_lambda_over_d = 2.0;  // q: the spot's diffraction scale on the camera
  int samples_per_subaperture = 0;        // n; 0: the smallest with n q >= 2 x pitch, at least 8
  int oversampling = 3;                   // os x os points per pixel (odd keeps one at the pixel centre)
  double source_sigma_px = 0.0;           // extended source: spot convolved with a Gaussian of this rms, px
};

std::string validate(const LensletOptics& o, const core::LensletGrid& grid);

// n actually used for these optics and grid.
int samples_per_subaperture(const LensletOptics& o, const core::LensletGrid& grid);

struct SubapertureTruth {
  std::vector<double> dx_px, dy_px;    // per subaperture (iy * n_x + ix): spot shift from the zero point
  std::vector<double> illuminated;     // fraction of the subaperture inside the pupil, 0..1
};

class LensletImager {
 public:
  // Precondition: validate(optics, grid) is empty.
  LensletImager(const LensletOptics& optics, const core::LensletGrid& grid);

  int samples() const { return n_; }
  // Pupil-plane samples across and down the lenslet array.
  int pupil_width() const { return n_ * grid_.n_subap_x; }
  int pupil_height() const { return n_ * grid_.n_subap_y; }

  // Adds each subaperture's spot (expected photo-electrons) into image
  // (row-major, image_width wide) and fills truth. phase and amplitude are
  // pupil_width() x pupil_height(), row-major; amplitude is 0 outside the
  // pupil and 1 inside (any value 0..1 is a transmission).
  void image(std::span<const double> phase, std::span<const double> amplitude, double photons,
             std::span<double> image_e, int image_width, SubapertureTruth& truth);

 private:
  LensletOptics optics_;
  core::LensletGrid grid_;
  int n_ = 0, m_ = 0;         // samples per subaperture, far-field points per box side
  Eigen::MatrixXcd kernel_;   // m x n: exp(-2 pi i (a - (n-1)/2) xi_k / (n q))
  Eigen::MatrixXcd field_, half_, far_;
  std::vector<float> fine_;
};

}  // namespace slopecast::sim

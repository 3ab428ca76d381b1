// Least-squares Zernike fit to Shack-Hartmann slopes (modal reconstruction).
//
// Each used subaperture gives two numbers: the optical path difference
// across it along x and along y (its slope times the OPD per px of spot
// shift, daemon/core/calibration/slope_units.h). The model for mode j of
// coefficient a_j (Noll, unit rms over the pupil disc, daemon/core/modal/
// zernike.h) is
//     dOPD_x = a_j (w / R) <dZ_j/drho_x>,    dOPD_y likewise,
// with w the subaperture's width and R the pupil radius (both px on the
// camera), and <.> the mean of the gradient over the part of the
// subaperture inside the pupil annulus (16 x 16 points): the G-tilt a
// centroid measures, not the value at the centre, so that modes beyond
// defocus do not alias into each other through the sampling. Piston has
// no slope and is not fitted: modes j = 2..max_noll.
//
// The reconstructor is the pseudo-inverse of that interaction matrix (a
// complete orthogonal decomposition, Eigen), built once per geometry and
// set of used subapertures.
#pragma once

#include <span>
#include <string>
#include <variant>
#include <vector>

#include <Eigen/Dense>

#include "daemon/core/calibration/valid_map.h"
#include "daemon/core/geometry/subaperture_layout.h"

namespace slopecast::core {

class ModalFit {
 public:
  // used: 1 where a subaperture enters the fit (box order). Fails with a
  // sentence when the pupil is not usable, or there are fewer slopes than
  // modes, or the modes cannot be told apart from these subapertures.
  static std::variant<ModalFit, std::string> make(const std::vector<SubapertureBox>& boxes,
                                                   std::span<const std::uint8_t> used, const PupilSpec& pupil,
                                                   int max_noll);

  int max_noll() const { return max_noll_; }
  int mode_count() const { return max_noll_ - 1; }  // j = 2..max_noll
  const std::vector<std::uint8_t>& used() const { return used_; }

  // Coefficients a_2..a_max (out[0] is j = 2) in the unit of
  // opd_per_px, from slopes in px (box order; unused entries ignored).
  void fit(std::span<const float> sx_px, std::span<const float> sy_px, double opd_per_px,
           std::span<double> out) const;
  // The slopes (px) these coefficients make: the model, for tests and
  // simulations. Unused subapertures get 0.
  void slopes_of(std::span<const double> coefficients, double opd_per_px, std::span<float> sx_px,
                 std::span<float> sy_px) const;

 private:
  int max_noll_ = 0;
  std::vector<std::uint8_t> used_;
  std::vector<int> rows_;                   // box index of each used subaperture
  Eigen::MatrixXd interaction_;             // 2U x M, OPD across a subaperture per unit coefficient
  Eigen::MatrixXd reconstructor_;           // M x 2U
  mutable Eigen::VectorXd slopes_, coeffs_;
};

// Wavefront rms from Noll coefficients a_2.. (out[0] is j = 2): sqrt of the
// sum of squares from first_j on (2: everything but piston; 4: without
// tip/tilt). Exact for an unobstructed pupil (the modes are orthonormal
// there); with an obstruction an approximation.
double wavefront_rms(std::span<const double> coefficients_from_j2, int first_j);

// Strehl ratio from the wavefront rms: exp(-(2 pi rms / lambda)^2) (the
// extended Marechal approximation; Mahajan 1982, JOSA 72, 1258). rms and
// wavelength in the same unit.
double strehl_estimate(double rms, double wavelength);

}  // namespace slopecast::core

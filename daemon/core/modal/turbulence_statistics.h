// Turbulence statistics: the von Karman phase spectrum and what it predicts
// for Shack-Hartmann measurements, and r0 estimated from measured slopes.
//
// Spectrum (Noll 1976, eq. 15, with the outer scale in von Karman's form):
//     Phi(f) = 0.023 r0^(-5/3) (f^2 + 1/L0^2)^(-11/6)   rad^2 m^2, f in cycles/m.
//
// Differential motion (the method of Sarazin & Roddier 1990, A&A 227, 294):
// the difference of the G-tilts (mean wavefront gradients, what a centroid
// measures) of two subapertures is insensitive to telescope shake and
// tracking and only weakly to L0. Its variance, for square subapertures of
// side d at centre spacing B = b d, along the separation (longitudinal) or
// across it (transverse), is
//     sigma^2 = K(b) lambda^2 d^(-1/3) r0^(-5/3)   rad^2 (angle on the sky),
// with K = (1/(2 pi))^2 int Phi_1(f) (2 pi f_axis)^2 A(f)^2 4 sin^2(pi f.B) d^2f
// (Phi_1: r0 = 1, d = 1, lambda = 1), A the aperture's filter:
// sinc(f_x d) sinc(f_y d) for a square, 2 J1(pi d f)/(pi d f) for a circle
// (derived; the circle reproduces Tokovinin 2002, PASP 114, 1156, to 1 %).
// Angles come from the optical path difference across a subaperture, which
// is achromatic: theta = dOPD / d. So r0 is estimated at any reference
// wavelength (500 nm by convention) without knowing the sensing one.
//
// Zernike variances (Noll 1976): <a_j^2> = int Phi(f) |Q_j(f)|^2 d^2f with,
// averaged over direction, |Q_j|^2 = (n+1) (2 J_{n+1}(pi D f) / (pi D f))^2;
// for L0 -> infinity, 0.449 (D/r0)^(5/3) rad^2 for each tilt.
#pragma once

#include <cstdint>
#include <span>
#include <string>
#include <vector>

#include "daemon/core/geometry/subaperture_layout.h"

namespace slopecast::core {

double von_karman_psd(double f_per_m, double r0_m, double outer_scale_m);

enum class ApertureShape { kSquare, kCircle };

// K above for apertures of size 1 at centre spacing b (along x), outer
// scale L0 in units of the aperture size (1e9: Kolmogorov).
double differential_tilt_coefficient(double b, bool longitudinal, ApertureShape shape, double outer_scale = 1e9);

// <a_j^2> of Noll mode j for D = 1, r0 = 1 (multiply by (D/r0)^(5/3)), L0
// in units of D.
double zernike_variance_coefficient(int j, double outer_scale = 1e9);

// Seeing FWHM, arcsec, from r0 at wavelength lambda (both m): 0.98 lambda / r0
// (Dierickx 1992, J. Mod. Opt. 39, 569; as used by Sarazin & Roddier 1990).
double seeing_arcsec(double wavelength_m, double r0_m);
// r0 scales as lambda^(6/5).
double r0_at(double r0_m, double from_wavelength_m, double to_wavelength_m);

// Pairs of subapertures one, two, ... pitches apart along x and along y,
// found in any layout from the boxes' centres (within a quarter pitch).
struct SubaperturePair {
  int a = 0, b = 0;
  int separation = 1;  // in pitches
  bool along_x = true;
};
std::vector<SubaperturePair> lattice_pairs(const std::vector<SubapertureBox>& boxes,
                                           std::span<const std::uint8_t> used, int max_separation);

// Differential-motion r0 from a window of frames. Slopes are given as OPD
// across a subaperture (m); pixels do not enter.
struct DifferentialR0 {
  bool ok = false;
  std::string refused;         // why not, when !ok
  double r0_m = 0;             // at reference_wavelength_m, from every class together
  double r0_longitudinal_m = 0, r0_transverse_m = 0;
  long frames = 0;             // frames in the window
  long pairs = 0;              // pairs that entered
};

class DifferentialMotion {
 public:
  // subaperture_m: a subaperture's side in the telescope pupil; window:
  // frames kept (a ring).
  DifferentialMotion(const std::vector<SubapertureBox>& boxes, std::span<const std::uint8_t> used,
                     double subaperture_m, double outer_scale_m, int window, int max_separation = 3);

  // One frame: OPD across each subaperture along x and y (m), and which
  // are valid in this frame.
  void add(std::span<const double> opd_x_m, std::span<const double> opd_y_m, std::span<const std::uint8_t> valid);
  void clear();
  long frames() const { return filled_; }

  // Each subaperture's variance over the window (valid frames only), in
  // the square of the unit given to add(); 0 with fewer than 2 frames.
  void temporal_variance(std::span<double> var_x, std::span<double> var_y) const;

  // noise_opd_m2: the variance of one OPD measurement due to noise (m^2),
  // removed twice (two subapertures) from each difference; 0 to ignore.
  DifferentialR0 estimate(double reference_wavelength_m, long min_frames = 50, double noise_opd_m2 = 0) const;

 private:
  std::vector<SubaperturePair> pairs_;
  std::vector<double> k_longitudinal_, k_transverse_;  // per separation 1..max
  double d_ = 0;
  int n_ = 0, window_ = 0, max_sep_ = 0;
  long filled_ = 0, next_ = 0;
  std::vector<float> x_, y_;           // window x n, ring
  std::vector<std::uint8_t> valid_;    // window x n
};

}  // namespace slopecast::core

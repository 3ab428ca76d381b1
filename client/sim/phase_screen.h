// Von Karman phase screens by FFT, with low-frequency subharmonics.
//
// The phase power spectrum (rad^2 per (cycle/m)^2) is the von Karman form
//   Phi(f) = 0.023 r0^(-5/3) (f^2 + 1/L0^2)^(-11/6)
// (Kolmogorov's law with an outer scale; the 0.023 constant is Noll 1976,
// eq. 15, from Fried 1965). A screen of N x N samples of side dx is the
// real part of sum_k c_k sqrt(Phi(f_k)) df exp(2 pi i f_k . x) over the FFT
// frequencies f_k (df = 1/(N dx)), with c_k complex unit Gaussians: every
// component is independent, so the covariance of two points is
// sum_k Phi(f_k) df^2 cos(2 pi f_k . r) exactly. The FFT grid leaves out
// the power below df, which matters for tip/tilt and for separations near
// the screen size; subharmonics add it back (Lane, Glindemann & Dainty,
// Waves in Random Media 2, 209, 1992): level p puts eight components at
// (m, n) df / 3^p around the origin, m, n in {-1, 0, 1}, each with weight
// sqrt(Phi) df / 3^p, the centre of each level being filled by the next.
// Their sum has its mean removed over the screen, as Johansson & Gavel
// (Proc. SPIE 2200, 372, 1994) do; piston has no physical effect here.
//
// The high-frequency part of the screen is periodic over N dx; the
// subharmonic part is not, so a path that wraps around the screen has a
// slope discontinuity in its lowest orders. The simulator therefore makes
// screens much larger than the pupil (design note in turbulence_sim.h).
#pragma once

#include <cstdint>
#include <random>
#include <string>
#include <vector>

namespace slopecast::sim {

struct PhaseScreenSettings {
  int size = 256;             // N samples per side (any size; cv::dft is fastest at 2^a 3^b 5^c)
  double dx_m = 0.01;         // sample spacing, m
  double r0_m = 0.1;          // Fried parameter at the wavelength the phase is wanted at, m
  double outer_scale_m = 25;  // L0, m; use a large value (1e6) for Kolmogorov
  int subharmonic_levels = 3; // 0: plain FFT screen
};

std::string validate(const PhaseScreenSettings& s);

// Phi(f) above, rad^2 m^2 (core::von_karman_psd: one definition for the
// simulator and the estimators).
double von_karman_psd(double f_per_m, double r0_m, double outer_scale_m);

// One screen, rad, row-major (index y * N + x).
std::vector<double> make_phase_screen(const PhaseScreenSettings& s, std::mt19937_64& rng);

// The exact expected structure function of screens made by
// make_phase_screen() at a separation of r samples along x (the same along
// y): 2 sum_k Phi(f_k) df_k^2 (1 - cos(2 pi f_kx r dx)) over every FFT and
// subharmonic component.
double sampled_structure_function(const PhaseScreenSettings& s, double r_samples);

// The continuum von Karman structure function at separation r (m):
// 4 pi int_0^inf f Phi(f) (1 - J0(2 pi f r)) df, integrated numerically.
// Tends to 6.88 (r/r0)^(5/3) as L0 -> infinity (Fried 1965).
double von_karman_structure_function(double r_m, double r0_m, double outer_scale_m);

}  // namespace slopecast::sim

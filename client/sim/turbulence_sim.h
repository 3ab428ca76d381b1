// A physical stand-in for a Shack-Hartmann camera on a telescope: layers of
// von Karman turbulence moving in frozen flow across a circular pupil with
// a central obstruction, static aberrations as Zernike modes, lenslet
// imaging by Fourier optics (lenslet_imaging.h), and the truth: each
// subaperture's mean phase gradient as a spot shift in pixels.
//
// Screens: each layer has its own screen, made once (phase_screen.h) with
// r0 scaled to its share of the turbulence (r0_i = r0 w_i^(-3/5), so the
// layers' 5/3-power sum gives r0 back). The screen is made larger than the
// pupil's path (path_s at the fastest wind, and at least 4 pupils; at most
// 2048 samples) and the pupil moves across it at the wind's speed;
// sub-sample shifts are bilinear interpolation between screen samples
// (which smooths the finest scales of a moving layer slightly: at most a
// sample's width). A path longer than the screen turns back at its edge
// and runs the other way: the phase stays continuous (wrapping around
// would put a seam across the pupil, as the subharmonics are not periodic)
// at the price of a reversed wind after each turn.
//
// Wavelengths: r0 is given at a stated wavelength (usually 500 nm) and the
// optical path difference is achromatic, so the phase at the sensing
// wavelength is scaled by lambda_r0 / lambda (r0 itself grows as
// lambda^(6/5)).
#pragma once

#include <cstdint>
#include <random>
#include <span>
#include <string>
#include <vector>

#include "client/sim/lenslet_imaging.h"
#include "client/sim/phase_screen.h"
#include "daemon/core/geometry/sensor_geometry.h"

namespace slopecast::sim {

struct TurbulenceLayer {
  double fraction = 1.0;            // share of the turbulence (C_n^2 weight); fractions are normalised
  double wind_m_per_s = 0.0;        // frozen-flow speed
  double wind_direction_deg = 0.0;  // direction of motion, from +x toward +y
};

struct TurbulenceScene {
  // Atmosphere; no layers means no turbulence (static aberrations only).
  double r0_m = 0.12;
  double r0_wavelength_nm = 500.0;
  double outer_scale_m = 25.0;
  int subharmonic_levels = 3;
  int screen_samples = 0;  // 0: automatic (see the note above), at most 2048
  double path_s = 0.0;     // time the screens must cover without turning back (the sim sets frames / rate)
  std::vector<TurbulenceLayer> layers{TurbulenceLayer{}};
  // Telescope pupil and the lenslets' footprint in it.
  double pupil_diameter_m = 1.0;
  double obstruction = 0.0;        // central obstruction, fraction of the diameter
  double subaperture_m = 0.0;      // one lenslet's side in the pupil; 0: diameter / lenslets across
  std::vector<double> zernike_nm;  // static aberrations: [0] is Noll j = 1 (piston), nm rms
  // Sensing.
  double wavelength_nm = 700.0;
  LensletOptics optics;
  // Light and time.
  double photons_per_subaperture = 5000.0;  // a fully illuminated subaperture, photo-electrons per frame
  double background_e_per_px = 0.0;         // sky and scattered light
  double dark_current_e_per_px = 0.0;       // per frame
  double rate_hz = 500.0;                   // frame k is at time k / rate_hz
};

std::string validate(const TurbulenceScene& s, const core::LensletGrid& grid);

class TurbulenceSim {
 public:
  // Precondition: validate(scene, grid) is empty. Makes the screens.
  TurbulenceSim(const TurbulenceScene& scene, const core::LensletGrid& grid, std::uint64_t seed);

  // Expected photo-electrons per pixel of frame k (camera-sized,
  // row-major) and its truth.
  void render(std::uint64_t k, std::span<double> image_e, int image_width, int image_height, SubapertureTruth& truth);

  // The pupil-plane phase of frame k at the sensing wavelength, rad,
  // pupil_width() x pupil_height() (for tests and for the truth).
  void phase(std::uint64_t k, std::vector<double>& out) const;
  int pupil_width() const { return imager_.pupil_width(); }
  int pupil_height() const { return imager_.pupil_height(); }
  double sample_m() const { return dx_; }
  const std::vector<double>& amplitude() const { return amplitude_; }
  int screen_samples() const { return screen_n_; }

 private:
  TurbulenceScene scene_;
  core::LensletGrid grid_;
  LensletImager imager_;
  double dx_ = 0.0;  // pupil sample spacing, m
  int screen_n_ = 0;
  std::vector<std::vector<double>> screens_;  // per layer, rad at the sensing wavelength
  std::vector<double> amplitude_, static_phase_, phase_;
};

}  // namespace slopecast::sim

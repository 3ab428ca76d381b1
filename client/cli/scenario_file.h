// Turbulence scenarios for `slopecast sim --scenario FILE`: a TOML file
// describing the sky, the telescope, the optics and the detector (the
// camera size, lenslet grid and endpoint come from the slopecastd config or
// the sim's own options). Every key is optional; unknown keys are refused.
//
//   [atmosphere]  r0_m, r0_wavelength_nm, outer_scale_m, subharmonic_levels,
//                 screen_samples
//   [[layer]]     fraction, wind_m_per_s, wind_direction_deg   (one table per
//                 layer; none at all: no turbulence, static aberrations only)
//   [pupil]       diameter_m, obstruction, subaperture_m
//   [aberrations] zernike_nm = [j=1, j=2, ...]   (Noll order, nm rms)
//   [optics]      wavelength_nm, pixels_per_lambda_over_d,
//                 samples_per_subaperture, oversampling, source_sigma_px
//   [light]       photons_per_subaperture, background_e_per_px
//   [detector]    read_noise_e, dark_current_e_per_px, bias_adu,
//                 gain_e_per_adu, bit_depth, photon_noise
#pragma once

#include <string>
#include <variant>

#include "client/sim/detector_model.h"
#include "client/sim/turbulence_sim.h"

namespace slopecast::cli {

struct ScenarioFile {
  sim::TurbulenceScene scene;
  sim::DetectorModel detector;
  int bit_depth = 0;  // 0: the pixel type's full scale
  bool layers_given = false;
};

std::variant<ScenarioFile, std::string> parse_scenario(const std::string& text, const std::string& source);
std::variant<ScenarioFile, std::string> read_scenario(const std::string& path);

}  // namespace slopecast::cli

// A simple CCD/CMOS detector: photon (Poisson) noise, Gaussian read noise,
// gain, bias, quantisation and saturation.
//
//   ADU = clamp(round((Poisson(expected_e) + Normal(0, read_noise_e)) / gain_e_per_adu
//                     + bias_adu), 0, full_scale_adu)
//
// Integer cameras (u8/u16/u32) round and clamp; an f32 camera keeps the
// unrounded value and clamps only at 0.
#pragma once

#include <cstdint>
#include <random>
#include <span>
#include <string>
#include <vector>

#include "daemon/core/frame/pixel_format.h"

namespace slopecast::sim {

struct DetectorModel {
  double read_noise_e = 3.0;      // rms read noise, electrons per pixel
  double gain_e_per_adu = 1.0;    // electrons per ADU
  double bias_adu = 100.0;        // offset added to every pixel, ADU
  double full_scale_adu = 65535;  // saturation level, ADU (at most the pixel type's range)
  bool photon_noise = true;       // false: expected values without Poisson noise
};

// Empty when usable; otherwise what is wrong.
std::string validate(const DetectorModel& d);

// Converts expected photo-electrons per pixel into ADU (rounded unless
// rounding is false). Precondition: out.size() == expected_e.size().
void expose_adu(std::span<const double> expected_e, const DetectorModel& d, std::mt19937_64& rng,
                std::span<double> out, bool rounding = true);

// The same, stored as a u16 frame.
void expose(std::span<const double> expected_e, const DetectorModel& d, std::mt19937_64& rng,
            std::span<std::uint16_t> out);

// ADU values as little-endian pixels of the given format, tightly packed.
std::vector<std::byte> encode_pixels(std::span<const double> adu, core::PixelFormat format);

}  // namespace slopecast::sim

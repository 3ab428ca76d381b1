#include "client/sim/detector_model.h"

#include <algorithm>
#include <cmath>
#include <cstring>

#include <fmt/format.h>

namespace slopecast::sim {

std::string validate(const DetectorModel& d) {
  if (!(d.read_noise_e >= 0.0)) return fmt::format("read noise must be >= 0 e-, got {}", d.read_noise_e);
  if (!(d.gain_e_per_adu > 0.0)) return fmt::format("gain must be > 0 e-/ADU, got {}", d.gain_e_per_adu);
  if (!(d.full_scale_adu > 0.0 && d.full_scale_adu <= 4294967295.0))
    return fmt::format("full scale must be 1..4294967295 ADU, got {}", d.full_scale_adu);
  if (!(d.bias_adu >= 0.0 && d.bias_adu < d.full_scale_adu))
    return fmt::format("bias must be 0..{} ADU (below full scale), got {}", d.full_scale_adu, d.bias_adu);
  return {};
}

void expose_adu(std::span<const double> expected_e, const DetectorModel& d, std::mt19937_64& rng,
                std::span<double> out, bool rounding) {
  std::normal_distribution<double> read(0.0, d.read_noise_e > 0.0 ? d.read_noise_e : 1.0);
  for (std::size_t i = 0; i < expected_e.size(); ++i) {
    const double mean = std::max(0.0, expected_e[i]);
    double electrons = mean;
    if (d.photon_noise && mean > 0.0) {
      std::poisson_distribution<long> photons(mean);
      electrons = static_cast<double>(photons(rng));
    }
    if (d.read_noise_e > 0.0) electrons += read(rng);
    const double adu = electrons / d.gain_e_per_adu + d.bias_adu;
    out[i] = rounding ? std::clamp(std::round(adu), 0.0, d.full_scale_adu) : std::max(adu, 0.0);
  }
}

void expose(std::span<const double> expected_e, const DetectorModel& d, std::mt19937_64& rng,
            std::span<std::uint16_t> out) {
  std::vector<double> adu(expected_e.size());
  expose_adu(expected_e, d, rng, adu);
  for (std::size_t i = 0; i < adu.size(); ++i)
    out[i] = static_cast<std::uint16_t>(std::min(adu[i], 65535.0));
}

namespace {
template <typename T>
void encode_as(std::span<const double> adu, std::vector<std::byte>& out) {
  out.resize(adu.size() * sizeof(T));
  for (std::size_t i = 0; i < adu.size(); ++i) {
    const T v = static_cast<T>(adu[i]);
    std::memcpy(out.data() + i * sizeof(T), &v, sizeof(T));  // little-endian host (pixel_format.h)
  }
}
}  // namespace

std::vector<std::byte> encode_pixels(std::span<const double> adu, core::PixelFormat format) {
  std::vector<std::byte> out;
  switch (format) {
    case core::PixelFormat::kU8: encode_as<std::uint8_t>(adu, out); break;
    case core::PixelFormat::kU16: encode_as<std::uint16_t>(adu, out); break;
    case core::PixelFormat::kU32: encode_as<std::uint32_t>(adu, out); break;
    case core::PixelFormat::kF32: encode_as<float>(adu, out); break;
  }
  return out;
}

}  // namespace slopecast::sim

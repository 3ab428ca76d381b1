#include "client/sim/detector_model.h"

#include <algorithm>
#include <cmath>

#include <fmt/format.h>

namespace slopecast::sim {

std::string validate(const DetectorModel& d) {
  if (!(d.read_noise_e >= 0.0)) return fmt::format("read noise must be >= 0 e-, got {}", d.read_noise_e);
  if (!(d.gain_e_per_adu > 0.0)) return fmt::format("gain must be > 0 e-/ADU, got {}", d.gain_e_per_adu);
  if (!(d.bias_adu >= 0.0 && d.bias_adu < 65535.0))
    return fmt::format("bias must be 0..65535 ADU, got {}", d.bias_adu);
  if (!(d.full_scale_adu > 0.0 && d.full_scale_adu <= 65535.0))
    return fmt::format("full scale must be 1..65535 ADU, got {}", d.full_scale_adu);
  return {};
}

void expose(std::span<const double> expected_e, const DetectorModel& d, std::mt19937_64& rng,
            std::span<std::uint16_t> out) {
  std::normal_distribution<double> read(0.0, d.read_noise_e > 0.0 ? d.read_noise_e : 1.0);
  for (std::size_t i = 0; i < expected_e.size(); ++i) {
    const double mean = std::max(0.0, expected_e[i]);
    double electrons = mean;
    if (d.photon_noise && mean > 0.0) {
      std::poisson_distribution<long> photons(mean);
      electrons = static_cast<double>(photons(rng));
    }
    if (d.read_noise_e > 0.0) electrons += read(rng);
    const double adu = std::round(electrons / d.gain_e_per_adu + d.bias_adu);
    out[i] = static_cast<std::uint16_t>(std::clamp(adu, 0.0, d.full_scale_adu));
  }
}

}  // namespace slopecast::sim

#include "daemon/core/calibration/bad_pixels.h"

#include <algorithm>
#include <cmath>

#include <fmt/format.h>

namespace slopecast::core {

namespace {
double median_in_place(std::vector<float>& v) {
  if (v.empty()) return 0.0;
  const std::size_t n = v.size();
  std::nth_element(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(n / 2), v.end());
  const double upper = v[n / 2];
  if (n % 2 == 1) return upper;
  const double lower = *std::max_element(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(n / 2));
  return 0.5 * (lower + upper);  // the mean of the middle two, as numpy's median
}
}  // namespace

SigmaClipped sigma_clip(std::span<const float> values, double k, int max_iters) {
  std::vector<float> kept(values.begin(), values.end()), scratch;
  SigmaClipped r;
  for (int round = 0;; ++round) {
    scratch = kept;
    r.centre = median_in_place(scratch);
    double mean = 0.0;
    for (float v : kept) mean += v;
    mean /= std::max<std::size_t>(kept.size(), 1);
    double ss = 0.0;
    for (float v : kept) ss += (v - mean) * (v - mean);
    r.spread = kept.empty() ? 0.0 : std::sqrt(ss / kept.size());
    r.kept = kept.size();
    if (round == max_iters) break;
    const double limit = k * r.spread;
    const auto end = std::remove_if(kept.begin(), kept.end(), [&](float v) { return std::abs(v - r.centre) > limit; });
    if (end == kept.end()) break;
    kept.erase(end, kept.end());
    ++r.iterations;
  }
  return r;
}

std::string validate(const BadPixelSettings& s) {
  if (!(s.sigma > 0.0) || !std::isfinite(s.sigma))
    return fmt::format("bad-pixel sigma must be a finite number > 0, got {}", s.sigma);
  return {};
}

std::vector<std::uint8_t> bad_pixel_map(std::span<const float> mean, std::span<const float> stddev,
                                        const BadPixelSettings& s) {
  std::vector<std::uint8_t> map(mean.size(), kPixelGood);
  const SigmaClipped m = sigma_clip(mean);
  for (std::size_t i = 0; i < mean.size(); ++i) {
    if (mean[i] > m.centre + s.sigma * m.spread) map[i] |= kPixelHot;
    if (mean[i] < m.centre - s.sigma * m.spread) map[i] |= kPixelCold;
  }
  if (stddev.size() == mean.size()) {
    const SigmaClipped d = sigma_clip(stddev);
    for (std::size_t i = 0; i < stddev.size(); ++i)
      if (stddev[i] > d.centre + s.sigma * d.spread) map[i] |= kPixelNoisy;
  }
  return map;
}

}  // namespace slopecast::core

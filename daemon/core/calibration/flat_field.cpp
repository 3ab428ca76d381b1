#include "daemon/core/calibration/flat_field.h"

#include <cmath>

#include <fmt/format.h>

namespace slopecast::core {

std::variant<std::vector<float>, std::string> normalised_flat(std::span<const float> mean,
                                                              std::span<const float> dark, int width, int height,
                                                              const std::vector<SubapertureBox>& boxes,
                                                              std::span<const std::uint8_t> valid_map,
                                                              std::span<const std::uint8_t> bad) {
  const std::size_t n = static_cast<std::size_t>(width) * height;
  if (mean.size() != n || (!dark.empty() && dark.size() != n) || (!bad.empty() && bad.size() != n))
    return fmt::format("flat, dark and bad-pixel map must all be {} x {} px", width, height);
  std::vector<std::uint8_t> pupil(n, 0);
  for (std::size_t i = 0; i < boxes.size(); ++i) {
    if (!valid_map.empty() && !valid_map[i]) continue;
    const SubapertureBox& b = boxes[i];
    for (int y = b.y0; y < b.y0 + b.height; ++y)
      for (int x = b.x0; x < b.x0 + b.width; ++x) pupil[static_cast<std::size_t>(y) * width + x] = 1;
  }
  double sum = 0.0;
  std::size_t count = 0;
  for (std::size_t k = 0; k < n; ++k) {
    if (!pupil[k] || (!bad.empty() && bad[k])) continue;
    const double v = mean[k] - (dark.empty() ? 0.0 : dark[k]);
    if (!(v > 0.0))
      return fmt::format("flat pixel ({}, {}) inside the pupil has no light above the dark ({:.1f} ADU): mark it "
                         "bad, or check the illumination",
                         k % width, k / width, v);
    sum += v;
    ++count;
  }
  if (count == 0) return std::string("the flat has no pixel inside the pupil");
  const double norm = sum / count;
  std::vector<float> flat(n, 1.0f);
  for (std::size_t k = 0; k < n; ++k)
    if (pupil[k] && (bad.empty() || !bad[k]))
      flat[k] = static_cast<float>((mean[k] - (dark.empty() ? 0.0 : dark[k])) / norm);
  return flat;
}

}  // namespace slopecast::core

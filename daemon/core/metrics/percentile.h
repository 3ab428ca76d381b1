// Nearest-rank percentiles of a sample: the smallest value with at least a
// fraction p of the samples at or below it (p in (0, 1]).
#pragma once

#include <algorithm>
#include <cmath>
#include <span>

namespace slopecast::core {

// Precondition: sorted is sorted ascending and not empty.
template <typename T>
T nearest_rank(std::span<const T> sorted, double p) {
  const auto n = sorted.size();
  const auto k = static_cast<std::size_t>(std::ceil(p * static_cast<double>(n)));
  return sorted[std::clamp<std::size_t>(k, 1, n) - 1];
}

}  // namespace slopecast::core

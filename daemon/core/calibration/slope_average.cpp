#include "daemon/core/calibration/slope_average.h"

#include <cassert>

namespace slopecast::core {

SlopeAverager::SlopeAverager(int n)
    : sx_(static_cast<std::size_t>(n), 0.0), sy_(sx_.size(), 0.0), flux_(sx_.size(), 0.0), n_(sx_.size(), 0) {}

void SlopeAverager::add(const FrameMeasurement& m) {
  assert(static_cast<std::size_t>(m.size()) == n_.size());
  ++frames_;
  for (std::size_t i = 0; i < n_.size(); ++i) {
    flux_[i] += m.flux_adu[i];
    if (m.flags[i] != kFlagNone) continue;
    sx_[i] += m.slope_x_px[i];
    sy_[i] += m.slope_y_px[i];
    ++n_[i];
  }
}

SlopeAverager::Result SlopeAverager::result() const {
  Result r;
  const std::size_t n = n_.size();
  r.slope_x_px.assign(n, 0.0f);
  r.slope_y_px.assign(n, 0.0f);
  r.mean_flux_adu.assign(n, 0.0f);
  r.valid_frames = n_;
  for (std::size_t i = 0; i < n; ++i) {
    if (frames_ > 0) r.mean_flux_adu[i] = static_cast<float>(flux_[i] / frames_);
    if (n_[i] == 0) {
      ++r.never_valid;
      continue;
    }
    r.slope_x_px[i] = static_cast<float>(sx_[i] / n_[i]);
    r.slope_y_px[i] = static_cast<float>(sy_[i] / n_[i]);
    if (2 * n_[i] < frames_) ++r.seldom_valid;
  }
  return r;
}

}  // namespace slopecast::core

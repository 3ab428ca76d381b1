#include "daemon/core/geometry/sensor_geometry.h"

#include <fmt/format.h>

namespace slopecast::core {

namespace {
// Frames larger than this are almost certainly a misconfiguration; the limit
// keeps width * height * 4 bytes far from overflowing 32-bit sizes.
constexpr int kMaxSidePx = 16384;
}  // namespace

std::string validate(const CameraSpec& camera) {
  if (camera.width_px < 1 || camera.width_px > kMaxSidePx)
    return fmt::format("camera width_px must be 1..{}, got {}", kMaxSidePx, camera.width_px);
  if (camera.height_px < 1 || camera.height_px > kMaxSidePx)
    return fmt::format("camera height_px must be 1..{}, got {}", kMaxSidePx, camera.height_px);
  return {};
}

std::string validate(const LensletGrid& grid, const CameraSpec& camera) {
  if (grid.n_subap_x < 1) return fmt::format("subapertures_x must be >= 1, got {}", grid.n_subap_x);
  if (grid.n_subap_y < 1) return fmt::format("subapertures_y must be >= 1, got {}", grid.n_subap_y);
  if (grid.pitch_px < 2) return fmt::format("pitch_px must be >= 2, got {}", grid.pitch_px);
  if (grid.origin_x_px < 0) return fmt::format("origin_x_px must be >= 0, got {}", grid.origin_x_px);
  if (grid.origin_y_px < 0) return fmt::format("origin_y_px must be >= 0, got {}", grid.origin_y_px);
  const long right = static_cast<long>(grid.origin_x_px) + static_cast<long>(grid.n_subap_x) * grid.pitch_px;
  const long bottom = static_cast<long>(grid.origin_y_px) + static_cast<long>(grid.n_subap_y) * grid.pitch_px;
  if (right > camera.width_px)
    return fmt::format(
        "lenslet grid does not fit the camera: origin_x_px {} + subapertures_x {} * pitch_px {} = {} "
        "columns, camera width_px is {}",
        grid.origin_x_px, grid.n_subap_x, grid.pitch_px, right, camera.width_px);
  if (bottom > camera.height_px)
    return fmt::format(
        "lenslet grid does not fit the camera: origin_y_px {} + subapertures_y {} * pitch_px {} = {} "
        "rows, camera height_px is {}",
        grid.origin_y_px, grid.n_subap_y, grid.pitch_px, bottom, camera.height_px);
  return {};
}

}  // namespace slopecast::core

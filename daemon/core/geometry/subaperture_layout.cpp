#include "daemon/core/geometry/subaperture_layout.h"

#include <cmath>

#include <fmt/format.h>

namespace slopecast::core {

std::vector<SubapertureBox> regular_layout(const LensletGrid& g) {
  std::vector<SubapertureBox> boxes;
  boxes.reserve(static_cast<std::size_t>(g.count()));
  for (int iy = 0; iy < g.n_subap_y; ++iy)
    for (int ix = 0; ix < g.n_subap_x; ++ix)
      boxes.push_back({g.box_x0(ix), g.box_y0(iy), g.pitch_px, g.pitch_px, g.zero_x(ix), g.zero_y(iy)});
  return boxes;
}

std::string validate_layout(const std::vector<SubapertureBox>& boxes, const LensletGrid& grid,
                            const CameraSpec& camera) {
  if (static_cast<long>(boxes.size()) != static_cast<long>(grid.count()))
    return fmt::format("the layout has {} subapertures, the grid {} x {} = {}", boxes.size(), grid.n_subap_x,
                       grid.n_subap_y, grid.count());
  for (std::size_t i = 0; i < boxes.size(); ++i) {
    const SubapertureBox& b = boxes[i];
    if (b.width != grid.pitch_px || b.height != grid.pitch_px)
      return fmt::format("layout box {} is {} x {} px; every box must be pitch_px = {} square", i, b.width, b.height,
                         grid.pitch_px);
    if (b.x0 < 0 || b.y0 < 0 || static_cast<long>(b.x0) + b.width > camera.width_px ||
        static_cast<long>(b.y0) + b.height > camera.height_px)
      return fmt::format("layout box {} (x0 {}, y0 {}, {} x {} px) leaves the {} x {} frame", i, b.x0, b.y0, b.width,
                         b.height, camera.width_px, camera.height_px);
    if (!std::isfinite(b.ref_x) || !std::isfinite(b.ref_y))
      return fmt::format("layout box {} has a non-finite reference point", i);
  }
  return {};
}

std::vector<BoxRun> box_runs(const std::vector<SubapertureBox>& boxes) {
  std::vector<BoxRun> runs;
  for (std::size_t i = 0; i < boxes.size(); ++i) {
    if (!runs.empty()) {
      const SubapertureBox& prev = boxes[i - 1];
      const SubapertureBox& b = boxes[i];
      if (b.y0 == prev.y0 && b.height == prev.height && b.x0 == prev.x0 + prev.width) {
        ++runs.back().count;
        continue;
      }
    }
    runs.push_back({static_cast<int>(i), 1});
  }
  return runs;
}

}  // namespace slopecast::core

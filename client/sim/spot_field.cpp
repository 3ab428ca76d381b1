#include "client/sim/spot_field.h"

#include <fmt/format.h>

#include "client/sim/spot_image.h"

namespace slopecast::sim {

std::string validate(const SpotFieldSettings& s) {
  if (!(s.spot_sigma_px > 0.0)) return fmt::format("spot sigma must be > 0 px, got {}", s.spot_sigma_px);
  if (!(s.photons_per_spot >= 0.0)) return fmt::format("photons per spot must be >= 0, got {}", s.photons_per_spot);
  if (!(s.max_offset_px >= 0.0)) return fmt::format("max offset must be >= 0 px, got {}", s.max_offset_px);
  if (s.max_offset_px > 0.5 * s.grid.pitch_px)
    return fmt::format("max offset {} px would put spots outside their {} px boxes", s.max_offset_px,
                       s.grid.pitch_px);
  return {};
}

SpotOffsets draw_offsets(const SpotFieldSettings& s, std::mt19937_64& rng) {
  std::uniform_real_distribution<double> u(-s.max_offset_px, s.max_offset_px);
  SpotOffsets o;
  const int n = s.grid.count();
  o.dx_px.resize(n);
  o.dy_px.resize(n);
  for (int i = 0; i < n; ++i) {
    o.dx_px[i] = u(rng);
    o.dy_px[i] = u(rng);
  }
  return o;
}

std::vector<double> render_spot_field(const SpotFieldSettings& s, const SpotOffsets& o, int width,
                                      int height) {
  std::vector<double> img(static_cast<std::size_t>(width) * height, 0.0);
  const core::LensletGrid& g = s.grid;
  for (int iy = 0; iy < g.n_subap_y; ++iy)
    for (int ix = 0; ix < g.n_subap_x; ++ix) {
      const int i = iy * g.n_subap_x + ix;
      const ClipRect clip{g.box_x0(ix), g.box_y0(iy), g.box_x0(ix) + g.pitch_px, g.box_y0(iy) + g.pitch_px};
      add_gaussian_spot(img, width, g.zero_x(ix) + o.dx_px[i], g.zero_y(iy) + o.dy_px[i], s.spot_sigma_px,
                        s.photons_per_spot, clip);
    }
  return img;
}

}  // namespace slopecast::sim

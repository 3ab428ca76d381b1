#include "client/sim/spot_image.h"

#include <cassert>
#include <cmath>
#include <vector>

namespace slopecast::sim {

double gaussian_interval_fraction(double a, double b, double c, double sigma) {
  const double k = 1.0 / (sigma * std::sqrt(2.0));
  return 0.5 * (std::erf((b - c) * k) - std::erf((a - c) * k));
}

void add_gaussian_spot(std::span<double> image, int width, double x0, double y0, double sigma,
                       double photons, const ClipRect& clip) {
  assert(sigma > 0.0);
  // Separable: one erf difference per column and per row of the clip box.
  std::vector<double> fx(static_cast<std::size_t>(clip.x_hi - clip.x_lo));
  std::vector<double> fy(static_cast<std::size_t>(clip.y_hi - clip.y_lo));
  for (int x = clip.x_lo; x < clip.x_hi; ++x)
    fx[x - clip.x_lo] = gaussian_interval_fraction(x - 0.5, x + 0.5, x0, sigma);
  for (int y = clip.y_lo; y < clip.y_hi; ++y)
    fy[y - clip.y_lo] = gaussian_interval_fraction(y - 0.5, y + 0.5, y0, sigma);
  for (int y = clip.y_lo; y < clip.y_hi; ++y) {
    double* row = image.data() + static_cast<std::size_t>(y) * width;
    const double wy = photons * fy[y - clip.y_lo];
    for (int x = clip.x_lo; x < clip.x_hi; ++x) row[x] += wy * fx[x - clip.x_lo];
  }
}

}  // namespace slopecast::sim

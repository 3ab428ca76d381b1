// Pixel-integrated Gaussian spots: the simulator's ground truth.
//
// A spot of rms width sigma (px) centred at (x0, y0) carrying N photons puts
// into pixel (x, y) — which covers [x-1/2, x+1/2] x [y-1/2, y+1/2], the
// convention of daemon/core/frame/image_view.h — exactly
//
//   N * [Phi((x+1/2-x0)/sigma) - Phi((x-1/2-x0)/sigma)]
//     * [Phi((y+1/2-y0)/sigma) - Phi((y-1/2-y0)/sigma)],
//
// Phi the standard normal CDF, Phi(t) = (1 + erf(t/sqrt 2))/2. The spot is
// integrated over each pixel's area, not sampled at its centre.
#pragma once

#include <span>

namespace slopecast::sim {

// Fraction of a unit 1-D Gaussian (centre c, rms sigma) falling in [a, b].
double gaussian_interval_fraction(double a, double b, double c, double sigma);

// Adds a spot to image (row-major, width x height, expected photo-electrons),
// touching only pixels within the clip rectangle [x_lo, x_hi) x [y_lo, y_hi)
// (the spot's own subaperture box, so spots do not leak between boxes).
// Preconditions: sigma > 0; the clip rectangle lies inside the image.
struct ClipRect {
  int x_lo = 0, y_lo = 0, x_hi = 0, y_hi = 0;
};
void add_gaussian_spot(std::span<double> image, int width, double x0, double y0, double sigma,
                       double photons, const ClipRect& clip);

}  // namespace slopecast::sim

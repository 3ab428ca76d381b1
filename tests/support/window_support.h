// Windows for centroider tests: pixel-integrated Gaussian spots (from the
// simulator's erf integration, itself tested against a numerical integral in
// spot_image_test), and the window facts the pipeline would hand a
// centroider.
#pragma once

#include <vector>

#include "client/sim/spot_image.h"
#include "daemon/core/centroid/centroider.h"
#include "daemon/core/metrics/window_moments.h"

namespace slopecast::testing {

// A window of side n with a pixel-integrated Gaussian of rms sigma holding
// `photons` in total (over the whole plane), centred at (x0, y0),
// window-local px.
inline std::vector<float> spot_window(int n, double x0, double y0, double sigma, double photons) {
  std::vector<double> img(static_cast<std::size_t>(n) * n, 0.0);
  sim::add_gaussian_spot(img, n, x0, y0, sigma, photons, sim::ClipRect{0, 0, n, n});
  return {img.begin(), img.end()};
}

inline core::WindowView square(const std::vector<float>& px, int n) { return {px.data(), n, n, n}; }

// What the pipeline computes before calling a centroider.
inline core::WindowContext context_of(const core::WindowView& w, float noise_adu = 0.0f) {
  core::MomentAccumulator acc(w.width);
  return {acc.window(w), noise_adu};
}

inline core::SpotEstimate measure(core::Centroider& c, const core::WindowView& w, float noise_adu = 0.0f) {
  return c.measure(w, context_of(w, noise_adu));
}

}  // namespace slopecast::testing

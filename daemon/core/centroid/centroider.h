// The interface every centroider implements.
//
// A centroider looks at one corrected subaperture window (raw - dark -
// background) and says where the spot is, in window-local pixel coordinates
// (image_view.h convention: the first pixel's centre is (0, 0), x = column).
// The pipeline has already swept the window once for its flux, peak and
// moments (metrics/window_moments.h) and hands them over with the pixel noise,
// so a method never repeats that work.
//
// Implementations are pure and allocation-free in measure(); any scratch
// space is sized in the constructor from the window size. measure() may use
// that scratch, so one centroider object serves one thread.
#pragma once

#include <cmath>
#include <span>

#include "daemon/core/centroid/centroider_settings.h"
#include "daemon/core/frame/image_view.h"
#include "daemon/core/metrics/window_moments.h"

namespace slopecast::core {

// What the pipeline already knows about a window.
struct WindowContext {
  WindowMoments moments;   // of the corrected window, every pixel
  float noise_adu = 0.0f;  // rms noise of one pixel (border ring), ADU; 0 if unknown
};

struct SpotEstimate {
  double x = 0.0;        // spot position, window-local px
  double y = 0.0;        // spot position, window-local px
  bool located = false;  // false when no position can be defined (x, y then 0)
  // The method placed the spot but does not vouch for it: a fit that did not
  // converge, a correlation extremum on the edge of the search range, a
  // quad-cell signal at +-1 (spot entirely in one half).
  bool failed = false;
  // The method's own figure of merit: peak contrast for correlation, reduced
  // chi^2 for the Gaussian fit; 0 for the others.
  float quality = 0.0f;
  // The method's own width estimate (Gaussian fit), FWHM px; NaN when the
  // method has none and the moments' widths are used.
  float fwhm_x = NAN;
  float fwhm_y = NAN;
};

class Centroider {
 public:
  virtual ~Centroider() = default;
  virtual CentroiderKind kind() const = 0;
  // One window.
  virtual SpotEstimate measure(const WindowView& window, const WindowContext& context) = 0;
  // Every window of a strip (one row of subapertures): out[k] for window k,
  // context[k] its facts. The default calls measure() per window.
  // Precondition: context.size() and out.size() >= strip.n_windows.
  virtual void measure_strip(const StripView& strip, std::span<const WindowContext> context,
                             std::span<SpotEstimate> out) {
    for (int k = 0; k < strip.n_windows; ++k) out[k] = measure(strip.window(k), context[k]);
  }
};

}  // namespace slopecast::core

// The interface every centroider implements.
//
// A centroider looks at one corrected subaperture window and says where the
// spot is, in window-local pixel coordinates (image_view.h convention: the
// first pixel's centre is (0, 0), x = column). It also reports the window
// flux and peak, which the pipeline uses for validity and spot metrics.
//
// Implementations are pure and allocation-free in measure(); any scratch
// space is sized in the constructor from the window size. measure() may use
// that scratch, so one centroider object serves one thread.
#pragma once

#include <span>
#include <string_view>

#include "daemon/core/frame/image_view.h"

namespace slopecast::core {

enum class CentroiderKind { kCog };

std::string_view centroider_name(CentroiderKind kind);

struct SpotEstimate {
  double x = 0.0;       // spot position, window-local px
  double y = 0.0;       // spot position, window-local px
  double flux = 0.0;    // sum of corrected pixels, ADU
  double peak = 0.0;    // brightest corrected pixel, ADU
  bool located = false; // false when no position can be defined (x, y then 0)
};

class Centroider {
 public:
  virtual ~Centroider() = default;
  virtual CentroiderKind kind() const = 0;
  // One window.
  virtual SpotEstimate measure(const WindowView& window) = 0;
  // Every window of a strip (one row of subapertures): out[k] for window k.
  // The default calls measure() per window; a centroider whose arithmetic
  // runs column-wise overrides it to sweep whole strip rows at once, which
  // vectorises far better than 10-15 pixel window rows.
  // Precondition: out.size() >= strip.n_windows.
  virtual void measure_strip(const StripView& strip, std::span<SpotEstimate> out) {
    for (int k = 0; k < strip.n_windows; ++k) out[k] = measure(strip.window(k));
  }
};

}  // namespace slopecast::core

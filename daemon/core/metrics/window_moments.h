// Flux, peak and the first and second moments of corrected windows, and the
// spot widths and ellipticity that follow from them.
//
// For a window with corrected pixels I_i at window-local positions (x_i, y_i)
// (image_view.h convention):
//
//   flux = sum I_i,  cx = sum x_i I_i / flux,  cy likewise,
//   var_x = sum (x_i - cx)^2 I_i / flux,  var_y likewise,
//   cov_xy = sum (x_i - cx)(y_i - cy) I_i / flux.
//
// Every pixel counts, negative values included: with the background removed
// the noise has zero mean and the moments are unbiased (but noisy for faint
// spots); clipping or thresholding would bias them.
//
// Widths: a pixel-integrated Gaussian of rms sigma has second moment
// sigma^2 + 1/12 per axis (the variance of a uniform pixel of width 1 adds
// to the spot's; derived, tests/REFERENCES.md R1.2), so
//   fwhm = 2 sqrt(2 ln 2) sqrt(var - 1/12) = 2.3548 sqrt(var - 1/12)
// (the FWHM of a Gaussian: any optics handbook). Ellipticity is
// 1 - b/a with a >= b the rms widths along the principal axes (the square
// roots of the eigenvalues of the pixel-corrected covariance matrix): 0 for
// a round spot, toward 1 for a line.
//
// Accumulating per column, across rows, makes every update element-wise over
// a row, so the compiler vectorises it without reordering any floating-point
// sum; over a whole strip row (e.g. 240 px) the vector loop also amortises
// its set-up, which a 15-px window row does not. Each x moment follows from
// the column sums weighted by the column's x, so one sweep gives everything.
#pragma once

#include <cstdint>
#include <span>
#include <vector>

#include "daemon/core/frame/image_view.h"

namespace slopecast::core {

struct WindowMoments {
  double flux = 0.0;    // sum of pixels, ADU
  double peak = 0.0;    // brightest pixel summed, ADU (in the pipeline: the raw maximum)
  double trough = 0.0;  // darkest pixel, ADU (float path only; 0 on the folded path, whose pixels are >= 0)
  double cx = 0.0;      // centre of gravity, window-local px (0 when flux <= 0)
  double cy = 0.0;
  double var_x = 0.0;   // second central moments, px^2 (0 when flux <= 0)
  double var_y = 0.0;
  double cov_xy = 0.0;
  bool located = false; // flux > 0 and every figure finite
};

struct SpotShape {
  double fwhm_x = 0.0;       // px, from var_x (0 when not defined)
  double fwhm_y = 0.0;       // px
  double ellipticity = 0.0;  // 1 - minor/major, 0..1
};

inline constexpr double kFwhmPerSigma = 2.3548200450309493;  // 2 sqrt(2 ln 2)

// Widths and ellipticity of a located window (pixel variance 1/12 removed,
// negative results clamped to 0); all 0 when !m.located.
SpotShape spot_shape(const WindowMoments& m);

// spot_shape()'s formula from the central moments, for one window (V =
// double) or several at once (V a GCC vector of doubles, whose comparisons
// give lane masks): root(v, out) takes square roots. spot_shape() is this
// with V = double; the pipeline runs it four boxes at a time, and every
// lane gets spot_shape()'s figures, bit for bit (the same IEEE operations in
// the same order; selects stand for the branches).
template <typename V, typename Root>
inline void spot_shape_of(const V& var_x, const V& var_y, const V& cov_xy, Root root, V& fwhm_x, V& fwhm_y,
                          V& ellipticity) {
  constexpr double kPixelVariance = 1.0 / 12.0;
  const V zero = V{}, ax = var_x - kPixelVariance, ay = var_y - kPixelVariance;
  const V vx = 0.0 < ax ? ax : zero, vy = 0.0 < ay ? ay : zero;
  V root_x, root_y, r, root_ratio;
  root(vx, root_x);
  root(vy, root_y);
  fwhm_x = kFwhmPerSigma * root_x;
  fwhm_y = kFwhmPerSigma * root_y;
  // Eigenvalues of [[vx, c], [c, vy]].
  const V mean = 0.5 * (vx + vy);
  const V half_diff = 0.5 * (vx - vy);
  root(half_diff * half_diff + cov_xy * cov_xy, r);
  const V major = mean + r, below = mean - r, minor = 0.0 < below ? below : zero;
  root(minor / major, root_ratio);
  ellipticity = major > 0.0 ? 1.0 - root_ratio : zero;
}

// The folded path (u8/u16 frames): the moments of (raw - dark - level)
// come from raw integer column sums (frame/raw_columns.h) minus constants,
// because every moment is linear in the pixels:
//   sum w (raw - dark - level) = sum w raw - sum w dark - level sum w
// for each weight w in {1, x, y, x^2, y^2, xy} (window-local x, y). The
// dark's sums are per-box constants computed once (FoldedDark); the level's
// are the box geometry's. Only the border ring is read again, for the level.
struct FoldedDark {
  double d00 = 0, d10 = 0, d01 = 0, d20 = 0, d02 = 0, d11 = 0;  // sum w dark over the box
};
// dark: row-major, image_width wide (empty: no dark, all zero).
FoldedDark fold_dark(std::span<const float> dark, int image_width, int x0, int y0, int width, int height);

// A change to one pixel of a window, added to every sum before the moments
// are formed: a bad pixel's repair (its replacement minus its value) on the
// folded path, where pixels are never written out.
struct PixelPatch {
  int x = 0, y = 0;    // window-local
  double delta = 0.0;  // ADU
};

struct RawColumns;
enum class SimdLevel;
// Moments of the w x h window whose raw column sums are cols[x0 .. x0+w-1]
// (accumulated over h rows), minus dark and a uniform level, plus patches.
// peak is the brightest raw pixel (the column maxima), not corrected.
// fits_32: box_sums_fit_32(w, h, the format's largest pixel), when the
// box's integer sums are formed in 32-bit lanes, four columns at a time,
// which then read up to kRawColumnSlack entries past x0 + w - 1 (ignored).
// Either way the sums are exact and the result the same.
WindowMoments folded_moments(const RawColumns& cols, int x0, int w, int h, const FoldedDark& dark, double level,
                             std::span<const PixelPatch> patches = {}, bool fits_32 = false);
// folded_moments() of count boxes side by side in one run of column sums
// (box k's columns from k * w), dark[k] and level[k] for box k, without
// patches, into out[k]: bit for bit what folded_moments() gives, with the
// per-box arithmetic four boxes at a time in vector lanes. simd picks the
// AVX2 build of the same source (frame/raw_columns.h).
void folded_moments_run(const RawColumns& cols, int count, int w, int h, const FoldedDark* dark, const float* level,
                        bool fits_32, SimdLevel simd, WindowMoments* out);
// Whether every integer sum of a w x h box of pixels up to max_pixel is
// below 2^32 (u16: boxes up to 21 x 21 px; u8: every box the folded path takes).
bool box_sums_fit_32(int w, int h, std::uint32_t max_pixel);

class MomentAccumulator {
 public:
  // max_width: the widest window or strip it will be given, px.
  explicit MomentAccumulator(int max_width);
  WindowMoments window(const WindowView& w);
  // out[k] for window k of the strip. Precondition: out.size() >= n_windows.
  void strip(const StripView& s, std::span<WindowMoments> out);

 private:
  void accumulate_columns(const float* data, int width, int height, int stride);
  WindowMoments reduce(int x0, int width, int height) const;
  std::vector<float> col_sum_, col_y_, col_yy_, col_peak_, col_trough_;  // one entry per column
};

}  // namespace slopecast::core

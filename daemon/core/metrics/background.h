// The local background of a subaperture and the noise of its flux.
//
// Without a dark frame the camera bias and any diffuse light sit under every
// spot. Left in, a uniform pedestal B (ADU/px) over an N-pixel box pulls the
// CoG toward the box centre by the gain F/(F + B N) (derived: the pedestal's
// own centroid is the box centre; tests/REFERENCES.md R1.5), and it makes an
// unlit box look bright. The pipeline therefore estimates the background of
// each box from its border ring -- the 4(p-1) outermost pixels of a p x p
// box, where a spot kept inside the box puts almost no light -- and
// subtracts it.
//
// Estimator: about the ring's median m, rounds of clipping at 3.5 times the
// rms about m (first of all ring pixels, then of those kept, until stable) remove hot
// pixels and a spot tail; the background level is the mean of the n pixels
// kept and the pixel noise sigma_pix is their rms, floored at 1/sqrt(12)
// ADU, the rounding noise of an integer readout (derived: variance of a
// uniform distribution of width 1).
//
// The flux F = sum over the box of (pixel - level) then has noise
//
//   sigma_F^2 = sigma_pix^2 * (N + N^2/n - 2N)     (background subtracted)
//   sigma_F^2 = sigma_pix^2 * N                    (not subtracted)
//
// N^2/n is the level's own error, counted once per pixel; -2N is its
// covariance with the ring pixels that are summed in F too (each has
// cov(p_j, level) = sigma^2/n, so the ring's sum has cov sigma^2 with the
// level, counted 2N times). Derived; checked by simulation in
// tests/unit/core/background_test.cpp. The spot's own photon noise is left
// out (the detector gain is not known here), so the figure is the
// significance of the flux against an empty box: with no light it is close
// to N(0, 1), and a floor of 5 ("common practice": 3-5 sigma detection
// thresholds) keeps a dark box from passing as lit.
#pragma once

#include <span>

#include "daemon/core/frame/image_view.h"
#include "daemon/core/frame/raw_columns.h"

namespace slopecast::core {

enum class BackgroundMode {
  kNone,          // nothing subtracted (a dark frame is expected to do it)
  kBorder,        // clipped mean of the box's border ring, subtracted from the box
  kBorderMedian,  // median of the border ring (noise: 1.4826 MAD), subtracted
};

// True for the modes that subtract a level per box.
inline bool subtracts_border(BackgroundMode m) { return m != BackgroundMode::kNone; }

// "none" / "border" / "border_median"; parse gives false for anything else.
const char* background_mode_name(BackgroundMode m);
bool parse_background_mode(const char* name, BackgroundMode& out);

// Smallest box side for which kBorder leaves an interior for the spot.
inline constexpr int kMinPitchForBorderBackground = 5;

struct BorderStats {
  float level_adu = 0.0f;      // mean of the ring pixels kept: the background
  float sigma_adu = 0.0f;      // rms of the pixels kept, floored at 1/sqrt(12)
  int n_border = 0;            // pixels in the ring
  int n_kept = 0;              // ring pixels within the clip
  bool finite = true;          // false if the ring holds a NaN/inf (stats then 0)
};

// Number of border pixels of a w x h window (the whole window when either
// side is below 3).
int border_pixel_count(int width, int height);
// Floats of scratch border_stats() needs for a w x h window.
inline int border_scratch_size(int width, int height) { return 2 * border_pixel_count(width, height) + 8; }

// Level and noise of the window's border ring, as above (kBorderMedian:
// level the ring's median, noise 1.4826 times its median absolute deviation
// (R2.1), floored likewise, n_kept the whole ring). scratch must hold at
// least border_scratch_size(w, h) floats; it is overwritten.
// Allocation-free.
BorderStats border_stats(const WindowView& window, std::span<float> scratch,
                         BackgroundMode mode = BackgroundMode::kBorder);

struct Box;
// The dark frame's values at a box's ring pixels, in ring order (computed
// once per box, so that the frame loop reads them contiguously). dark is
// row-major, image_width wide.
void ring_dark_values(std::span<const float> dark, int image_width, const Box& box, float* out);

// For many boxes at once (the pipeline's path): gather each box's ring in
// ring order into ring (room for border_scratch_size floats), from a
// corrected window (gather_border) or from the raw frame minus ring_dark
// (gather_border_raw: the dark's values at the ring pixels, in ring order,
// as ring_dark_values() lays them out; empty for no dark), then
// border_stats_batch() on the gathered rings, rings[i * stride ...] for box
// i (stride >= border_scratch_size; the rings are overwritten). out[i] is
// bit for bit what border_stats() gives for ring i: eight boxes share
// vector lanes, with every sum in the same order. soa:
// border_batch_scratch_size(n) floats of scratch. simd picks the AVX2
// build of the same source (frame/raw_columns.h).
void gather_border(const WindowView& window, float* ring);
void gather_border_raw(const ImageView& image, std::span<const float> ring_dark, const Box& box, float* ring);
inline int border_batch_scratch_size(int n_ring) { return 8 * (n_ring + 4) + 8; }
void border_stats_batch(float* rings, int stride, int count, int n_ring, BackgroundMode mode,
                        std::span<BorderStats> out, std::span<float> soa, SimdLevel simd);

// Subtracts value from every pixel of the window (the window's memory is
// writable scratch in the pipeline, hence the cast-free float* argument).
void subtract_constant(float* data, int width, int height, int stride, float value);

// Significance of a flux, per the formula above. n_pixels: box pixels;
// n_ring: ring pixels behind the level (BorderStats::n_kept).
double flux_snr(double flux_adu, double sigma_pix_adu, int n_pixels, int n_ring, bool subtracted);

// The same formula for one box (V = double) or several at once (V a GCC
// vector of doubles, whose comparisons give lane masks): root(v, out) takes
// square roots. flux_snr() is this with V = double; the pipeline runs it
// four boxes at a time, and every lane gets flux_snr()'s value, bit for
// bit (the same IEEE operations in the same order; selects stand for the
// branches).
template <typename V, typename Root>
inline void flux_snr_of(const V& flux, const V& sigma_pix, int n_pixels, const V& n_ring, bool subtracted, Root root,
                        V& out) {
  const double n = n_pixels;
  const V one = V{} + 1.0, all_n = V{} + n, zero = V{};
  V var = n + n * n / n_ring - 2.0 * n;
  var = var < 1.0 ? one : var;
  var = subtracted ? (n_ring > 0.0 ? var : all_n) : all_n;
  V r;
  root(var, r);
  out = flux / (sigma_pix * r);
  out = flux > 0.0 ? out : zero;
  out = sigma_pix > 0.0 ? out : zero;
}

}  // namespace slopecast::core

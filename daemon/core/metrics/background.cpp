#include "daemon/core/metrics/background.h"

#include <algorithm>
#include <cassert>
#include <cmath>
#include <cstring>

namespace slopecast::core {

namespace {
const float kRoundingSigma = static_cast<float>(1.0 / std::sqrt(12.0));

// Median of v (reorders it). Even counts take the mean of the two middle values.
float median_of(float* v, int n) {
  const int mid = n / 2;
  std::nth_element(v, v + mid, v + n);
  const float upper = v[mid];
  if (n % 2) return upper;
  const float lower = *std::max_element(v, v + mid);
  return 0.5f * (lower + upper);
}
}  // namespace

const char* background_mode_name(BackgroundMode m) {
  switch (m) {
    case BackgroundMode::kNone: return "none";
    case BackgroundMode::kBorder: return "border";
  }
  return "?";
}

bool parse_background_mode(const char* name, BackgroundMode& out) {
  for (BackgroundMode m : {BackgroundMode::kNone, BackgroundMode::kBorder})
    if (std::strcmp(background_mode_name(m), name) == 0) {
      out = m;
      return true;
    }
  return false;
}

int border_pixel_count(int width, int height) {
  if (width < 3 || height < 3) return width * height;
  return 2 * width + 2 * (height - 2);
}

BorderStats border_stats(const WindowView& w, std::span<float> scratch) {
  const int n = border_pixel_count(w.width, w.height);
  assert(scratch.size() >= 2 * static_cast<std::size_t>(n));
  float* ring = scratch.data();  // the ring's values, in ring order
  float* work = ring + n;        // reordered by the selections
  int k = 0;
  auto row = [&](int y) { return w.data + static_cast<std::size_t>(y) * w.stride; };
  if (w.width < 3 || w.height < 3) {
    for (int y = 0; y < w.height; ++y)
      for (int x = 0; x < w.width; ++x) ring[k++] = row(y)[x];
  } else {
    for (int x = 0; x < w.width; ++x) ring[k++] = row(0)[x];
    for (int x = 0; x < w.width; ++x) ring[k++] = row(w.height - 1)[x];
    for (int y = 1; y < w.height - 1; ++y) {
      ring[k++] = row(y)[0];
      ring[k++] = row(y)[w.width - 1];
    }
  }
  BorderStats b;
  b.n_border = n;
  for (int i = 0; i < n; ++i)
    if (!std::isfinite(ring[i])) {
      b.finite = false;  // nth_element needs a strict weak order: no NaN
      return b;
    }
  std::copy(ring, ring + n, work);
  b.median_adu = median_of(work, n);
  const double median = b.median_adu;
  // The median anchors the ring; rounds of 3.5-sigma clipping about it (until
  // no pixel changes side)
  // remove outliers (hot pixels, a spot tail), the first round's sigma taken
  // from all pixels (an outlier only widens it), each next from the pixels
  // the previous kept. The level is the mean of the pixels kept: on integer data
  // the median sticks to whole ADU, and each 1 ADU step moves a 225-pixel
  // box's flux by 225 ADU, which gave empty boxes a lumpy, long-tailed flux
  // (measured: a significance of 6.3 among 51 200 empty boxes). A second
  // selection for the MAD cost 0.6 us per box (perf: 70 % of the frame).
  double clip = HUGE_VAL, mean_d = 0.0, var = 0.0;
  int kept = 0;
  for (int round = 0; round < 8; ++round) {  // until no pixel changes side; 8 at most
    double sum = 0.0, sum2 = 0.0;
    int k_round = 0;
    for (int i = 0; i < n; ++i) {
      const double d = ring[i] - median;
      if (std::abs(d) > clip) continue;
      sum += d;
      sum2 += d * d;
      ++k_round;
    }
    // The median lies within any clip of at least half the ring, so k_round > 0.
    const bool stable = k_round == kept;
    kept = k_round;
    mean_d = sum / kept;
    var = kept > 1 ? std::max((sum2 - kept * mean_d * mean_d) / (kept - 1), 0.0) : 0.0;
    if (stable) break;
    clip = 3.5 * std::max(std::sqrt(sum2 / kept), static_cast<double>(kRoundingSigma));
  }
  b.level_adu = static_cast<float>(median + mean_d);
  b.n_kept = kept;
  b.sigma_adu = std::max(static_cast<float>(std::sqrt(var)), kRoundingSigma);
  return b;
}

void subtract_constant(float* data, int width, int height, int stride, float value) {
  for (int y = 0; y < height; ++y) {
    float* r = data + static_cast<std::size_t>(y) * stride;
    for (int x = 0; x < width; ++x) r[x] -= value;
  }
}

double flux_snr(double flux, double sigma_pix, int n_pixels, int n_ring, bool subtracted) {
  if (!(flux > 0.0) || !(sigma_pix > 0.0)) return 0.0;
  const double n = n_pixels;
  double var = n;
  if (subtracted && n_ring > 0) var = std::max(n + n * n / n_ring - 2.0 * n, 1.0);
  return flux / (sigma_pix * std::sqrt(var));
}

}  // namespace slopecast::core

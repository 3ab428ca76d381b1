// Bad pixels from a dark stack, by iterative sigma clipping.
//
// sigma_clip() is the classic procedure (as in astropy.stats.sigma_clip
// with its defaults cenfunc = median, stdfunc = std): centre = median of the
// kept values, spread = their population standard deviation; drop every
// value with |v - centre| > k spread; repeat until nothing more is dropped
// or max_iters rounds have run. The tests compare it with astropy.
//
// A pixel is bad when its mean over the stack lies more than `sigma` clipped
// spreads from the clipped centre of all means (hot: a dark current or
// offset far above the rest; cold: a dead pixel reading below the bias), or
// its temporal standard deviation lies more than `sigma` spreads above the
// clipped centre of all deviations (noisy: random telegraph noise, a
// flickering column).
#pragma once

#include <cstdint>
#include <span>
#include <string>
#include <vector>

namespace slopecast::core {

struct SigmaClipped {
  double centre = 0.0;  // median of the kept values
  double spread = 0.0;  // population standard deviation of the kept values
  std::size_t kept = 0;
  int iterations = 0;   // rounds that dropped something
};

// Precondition: values finite. Allocates a working copy.
SigmaClipped sigma_clip(std::span<const float> values, double k = 3.0, int max_iters = 5);

enum BadPixelKind : std::uint8_t {
  kPixelGood = 0,
  kPixelHot = 1,    // mean far above the rest
  kPixelCold = 2,   // mean far below the rest (dead)
  kPixelNoisy = 4,  // temporal spread far above the rest
};

struct BadPixelSettings {
  double sigma = 5.0;  // clipped spreads from the centre that make a pixel bad
};

std::string validate(const BadPixelSettings& s);

// mean, stddev: per pixel over a dark stack (FrameAverager); stddev may be
// empty (fewer than two frames), then only the mean is judged. Returns one
// BadPixelKind bit set per pixel.
std::vector<std::uint8_t> bad_pixel_map(std::span<const float> mean, std::span<const float> stddev,
                                        const BadPixelSettings& s);

}  // namespace slopecast::core

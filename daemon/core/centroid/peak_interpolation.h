// Sub-pixel position of the extremum of a sampled function (a correlation
// map) from the samples around its integer extremum, after Löfdahl 2010,
// A&A 524, A90, Table 2. s(i, j), i, j in {-1, 0, 1}, are the samples around
// the integer extremum, first index x. Each returns the offset from it, px.
//
//   parabola (1QI), per axis:
//     dx = (s(-1) - s(+1)) / (2 (s(-1) - 2 s(0) + s(+1)))
//   3-point Gaussian, per axis, positive samples at a maximum only:
//     the parabola through ln s (exact for a Gaussian peak)
//   quadratic least squares (2LS): f = a1 + a2 x + a3 x^2 + a4 y + a5 y^2
//     + a6 xy fitted to all nine samples; by the normal equations
//       a2 = sum_j (s(1,j) - s(-1,j)) / 6,  a3 = sum_j (s(1,j) - 2 s(0,j) + s(-1,j)) / 6,
//       a4, a5 likewise with the axes swapped, a6 = (s(1,1) - s(-1,1) - s(1,-1) + s(-1,-1)) / 4,
//     and the extremum where the gradient vanishes:
//       dx = (2 a2 a5 - a4 a6) / (a6^2 - 4 a3 a5),  dy = (2 a3 a4 - a2 a6) / (a6^2 - 4 a3 a5).
//
// A degenerate case (flat samples, a non-positive sample for the Gaussian, a
// singular 2-D fit) gives NaN, which the caller reports as a failed
// estimate.
#pragma once

namespace slopecast::core {

struct PeakOffset {
  double dx = 0.0;
  double dy = 0.0;
};

double parabola_offset(double s_minus, double s_zero, double s_plus);
double gaussian_offset(double s_minus, double s_zero, double s_plus);
// s[j][i]: row j (y = j - 1), column i (x = i - 1).
PeakOffset quadratic_ls_offset(const double s[3][3]);

}  // namespace slopecast::core

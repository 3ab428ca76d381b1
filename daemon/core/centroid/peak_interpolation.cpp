#include "daemon/core/centroid/peak_interpolation.h"

#include <cmath>

namespace slopecast::core {

double parabola_offset(double m, double z, double p) {
  const double curvature = m - 2.0 * z + p;
  if (curvature == 0.0) return NAN;
  return (m - p) / (2.0 * curvature);
}

double gaussian_offset(double m, double z, double p) {
  if (!(m > 0.0 && z > 0.0 && p > 0.0)) return NAN;
  return parabola_offset(std::log(m), std::log(z), std::log(p));
}

PeakOffset quadratic_ls_offset(const double s[3][3]) {
  double a2 = 0.0, a3 = 0.0, a4 = 0.0, a5 = 0.0;
  for (int k = 0; k < 3; ++k) {
    a2 += s[k][2] - s[k][0];
    a3 += s[k][2] - 2.0 * s[k][1] + s[k][0];
    a4 += s[2][k] - s[0][k];
    a5 += s[2][k] - 2.0 * s[1][k] + s[0][k];
  }
  a2 /= 6.0;
  a3 /= 6.0;
  a4 /= 6.0;
  a5 /= 6.0;
  const double a6 = (s[2][2] - s[2][0] - s[0][2] + s[0][0]) / 4.0;
  const double det = a6 * a6 - 4.0 * a3 * a5;
  if (det == 0.0) return {NAN, NAN};
  return {(2.0 * a2 * a5 - a4 * a6) / det, (2.0 * a3 * a4 - a2 * a6) / det};
}

}  // namespace slopecast::core

#include "daemon/core/modal/zernike.h"

#include <cmath>

namespace slopecast::core {

ZernikeIndex noll_to_nm(int j) {
  int n = 0;
  while (j > (n + 1) * (n + 2) / 2) ++n;
  const int k = j - n * (n + 1) / 2 - 1;  // position within the order, 0-based
  const int m = n % 2 == 0 ? 2 * ((k + 1) / 2) : 2 * (k / 2) + 1;
  return {n, m};
}

double zernike_radial(int n, int m, double r) {
  double sum = 0.0;
  for (int s = 0; s <= (n - m) / 2; ++s) {
    const double c = std::tgamma(n - s + 1.0) /
                     (std::tgamma(s + 1.0) * std::tgamma((n + m) / 2 - s + 1.0) * std::tgamma((n - m) / 2 - s + 1.0));
    sum += (s % 2 ? -c : c) * std::pow(r, n - 2 * s);
  }
  return sum;
}

double zernike(int j, double r, double t) {
  const auto [n, m] = noll_to_nm(j);
  const double radial = zernike_radial(n, m, r);
  if (m == 0) return std::sqrt(n + 1.0) * radial;
  const double norm = std::sqrt(2.0 * (n + 1.0));
  return norm * radial * (j % 2 == 0 ? std::cos(m * t) : std::sin(m * t));
}

}  // namespace slopecast::core

// Zernike polynomials in Noll's ordering and normalisation (R. J. Noll,
// "Zernike polynomials and atmospheric turbulence", JOSA 66, 207, 1976):
// j = 1 piston, 2 tip (x), 3 tilt (y), 4 defocus, 5-6 astigmatism, ...;
// each mode has unit rms over the unit disc, so a coefficient is the rms
// of that mode's part of the wavefront.
//
//   Z_j = sqrt(n+1) R_n^0(r)                     m = 0
//   Z_j = sqrt(2(n+1)) R_n^m(r) cos(m t)         m != 0, j even
//   Z_j = sqrt(2(n+1)) R_n^m(r) sin(m t)         m != 0, j odd
#pragma once

namespace slopecast::core {

struct ZernikeIndex {
  int n = 0;  // radial order
  int m = 0;  // azimuthal frequency, >= 0
};

// Noll index j >= 1 to (n, m). Precondition: j >= 1.
ZernikeIndex noll_to_nm(int j);

// R_n^m(r) for 0 <= r <= 1.
double zernike_radial(int n, int m, double r);

// Z_j at polar coordinates (r, t) on the unit disc (r <= 1, t in radians
// from +x toward +y).
double zernike(int j, double r, double t);

}  // namespace slopecast::core

// Gaussian fit: weighted least squares of a pixel-integrated elliptical
// (axis-aligned) 2-D Gaussian plus a constant,
//
//   mu(i, j) = A gx(i) gy(j) + c,
//   gx(i) = Phi((i + 1/2 - x0) / sx) - Phi((i - 1/2 - x0) / sx)   (Phi: normal CDF)
//
// with six parameters (x0, y0, A, sx, sy, c), by Levenberg-Marquardt
// (Levenberg 1944; Marquardt 1963, SIAM J. Appl. Math. 11, 431): solve
// (H + lambda diag H) d = J^T W r with H = J^T W J, accept the step if the
// weighted chi^2 drops (lambda / 10) else retry (lambda x 10). The analytic
// derivatives are dgx/dx0 = -(phi(u+) - phi(u-)) / sx and
// dgx/dsx = -(u+ phi(u+) - u- phi(u-)) / sx with u+- = (i +- 1/2 - x0) / sx.
//
// Weights: 1 / var with var = noise^2 + adu_per_electron * max(mu - c, 0):
// the border ring's pixel noise plus the spot's own photon noise, so the fit
// approaches maximum likelihood and the Cramér–Rao bound (Winick 1986, JOSA
// A 3, 1809) where photon noise dominates; adu_per_electron = 0 gives equal
// weights. The weights follow the accepted parameters.
//
// Start: the pixel whose 3 x 3 neighbourhood holds the most light (a faint
// spot's brightest single pixel is often noise), refined by the CoG of that
// neighbourhood (negative pixels as 0); widths spot_sigma_px; c = 0 (the
// window is background-subtracted); A = window flux (or the 3 x 3 sum if the
// flux is not positive). Stop: converged once an accepted step moves the
// spot by less than fit_tolerance_px on both axes; failed after
// fit_max_iterations steps, when lambda exceeds 1e10 with no accepted step,
// or when the spot ends outside the window. Widths are kept in
// [0.05, 2 x box] px. The quality figure is the reduced chi^2 (chi^2 /
// (pixels - 6)), about 1 when the noise model fits; the fitted widths are
// reported as FWHM (2.3548 sx, 2.3548 sy).
#pragma once

#include <vector>

#include "daemon/core/centroid/centroider.h"

namespace slopecast::core {

struct GaussianFitResult {
  double x0 = 0.0, y0 = 0.0, amplitude = 0.0, sigma_x = 0.0, sigma_y = 0.0, constant = 0.0;
  double reduced_chi2 = 0.0;
  int iterations = 0;
  bool converged = false;
};

class GaussianFitCentroider final : public Centroider {
 public:
  // max_side: the largest window side it will be given, px.
  GaussianFitCentroider(const CentroiderSettings& s, int max_side);
  CentroiderKind kind() const override { return CentroiderKind::kGaussianFit; }
  SpotEstimate measure(const WindowView& window, const WindowContext& context) override;
  // The whole fit (for tests and the evaluation bench).
  GaussianFitResult fit(const WindowView& window, const WindowContext& context);

 private:
  struct Params {
    double v[6];  // x0, y0, A, sx, sy, c
  };
  // Fills the per-axis profile and derivative tables for p.
  void tabulate(const Params& p, int w, int h);
  // Weighted chi^2 of p (tables already filled for p).
  double chi2(const WindowView& win, const Params& p) const;

  double spot_sigma_, tolerance_, gain_;
  int max_iterations_;
  // Scratch, one entry per column / row: profile, d/dx0, d/dsigma.
  std::vector<double> gx_, dgx_, sgx_, gy_, dgy_, sgy_;
  double noise2_ = 1.0;
};

}  // namespace slopecast::core

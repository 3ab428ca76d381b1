#include "daemon/core/centroid/centroid_gaussian_fit.h"

#include <algorithm>
#include <cmath>

#include <Eigen/Dense>

namespace slopecast::core {

namespace {
constexpr double kInvSqrt2 = 0.70710678118654752440;
constexpr double kInvSqrt2Pi = 0.39894228040143267794;
double cdf(double u) { return 0.5 * std::erfc(-u * kInvSqrt2); }
double pdf(double u) { return kInvSqrt2Pi * std::exp(-0.5 * u * u); }

// Profile of one axis: g(i), dg/dx0, dg/dsigma.
void axis_tables(double x0, double s, int n, double* g, double* dg, double* sg) {
  for (int i = 0; i < n; ++i) {
    const double up = (i + 0.5 - x0) / s, um = (i - 0.5 - x0) / s;
    const double pp = pdf(up), pm = pdf(um);
    g[i] = cdf(up) - cdf(um);
    dg[i] = -(pp - pm) / s;
    sg[i] = -(up * pp - um * pm) / s;
  }
}
}  // namespace

GaussianFitCentroider::GaussianFitCentroider(const CentroiderSettings& s, int max_side)
    : spot_sigma_(s.spot_sigma_px),
      tolerance_(s.fit_tolerance_px),
      gain_(s.adu_per_electron),
      max_iterations_(s.fit_max_iterations),
      gx_(max_side), dgx_(max_side), sgx_(max_side), gy_(max_side), dgy_(max_side), sgy_(max_side) {}

void GaussianFitCentroider::tabulate(const Params& p, int w, int h) {
  axis_tables(p.v[0], p.v[3], w, gx_.data(), dgx_.data(), sgx_.data());
  axis_tables(p.v[1], p.v[4], h, gy_.data(), dgy_.data(), sgy_.data());
}

// Each point's chi^2 uses its own noise model (the weights of p), as a
// likelihood would.
double GaussianFitCentroider::chi2(const WindowView& win, const Params& p) const {
  double sum = 0.0;
  for (int j = 0; j < win.height; ++j) {
    const float* row = win.data + static_cast<std::size_t>(j) * win.stride;
    for (int i = 0; i < win.width; ++i) {
      const double signal = p.v[2] * gx_[i] * gy_[j];
      const double r = row[i] - (signal + p.v[5]);
      const double var = noise2_ + gain_ * std::max(signal, 0.0);
      sum += r * r / var;
    }
  }
  return sum;
}

GaussianFitResult GaussianFitCentroider::fit(const WindowView& win, const WindowContext& c) {
  GaussianFitResult out;
  const int w = win.width, h = win.height;
  noise2_ = std::max(static_cast<double>(c.noise_adu) * c.noise_adu, 1.0 / 12.0);
  // Start where the 3 x 3 sum is largest (a faint spot's brightest single
  // pixel is often noise; nine pixels of it are not), refined by the CoG of
  // that 3 x 3 neighbourhood with negative pixels as 0.
  auto px = [&](int i, int j) { return win.data[static_cast<std::size_t>(j) * win.stride + i]; };
  int bi = 0, bj = 0;
  double best = -HUGE_VAL;
  for (int j = 0; j < h; ++j)
    for (int i = 0; i < w; ++i) {
      double box = 0.0;
      for (int v = std::max(0, j - 1); v <= std::min(h - 1, j + 1); ++v)
        for (int u = std::max(0, i - 1); u <= std::min(w - 1, i + 1); ++u) box += px(u, v);
      if (box > best) {
        best = box;
        bi = i;
        bj = j;
      }
    }
  if (!(best > 0.0)) return out;
  double s = 0.0, sx = 0.0, sy = 0.0;
  for (int j = std::max(0, bj - 1); j <= std::min(h - 1, bj + 1); ++j)
    for (int i = std::max(0, bi - 1); i <= std::min(w - 1, bi + 1); ++i) {
      const double v = std::max(0.0f, px(i, j));
      s += v;
      sx += v * i;
      sy += v * j;
    }
  if (!(s > 0.0)) return out;
  const double sig0 = spot_sigma_;
  Params p{{sx / s, sy / s,
            c.moments.flux > 0.0 ? c.moments.flux : best, sig0, sig0, 0.0}};
  const double sig_min = 0.05, sig_max = 2.0 * std::max(w, h);

  tabulate(p, w, h);
  double chi = chi2(win, p);
  double lambda = 1e-3;
  int it = 0;
  bool converged = false;
  using Mat6 = Eigen::Matrix<double, 6, 6>;
  using Vec6 = Eigen::Matrix<double, 6, 1>;
  while (it < max_iterations_) {
    ++it;
    // Normal equations at p (tables hold p's profiles).
    Mat6 hm = Mat6::Zero();
    Vec6 g = Vec6::Zero();
    for (int j = 0; j < h; ++j) {
      const float* row = win.data + static_cast<std::size_t>(j) * win.stride;
      for (int i = 0; i < w; ++i) {
        const double prof = gx_[i] * gy_[j];
        const double signal = p.v[2] * prof;
        const double r = row[i] - (signal + p.v[5]);
        const double wt = 1.0 / (noise2_ + gain_ * std::max(signal, 0.0));
        Vec6 jac;
        jac << p.v[2] * dgx_[i] * gy_[j], p.v[2] * gx_[i] * dgy_[j], prof, p.v[2] * sgx_[i] * gy_[j],
            p.v[2] * gx_[i] * sgy_[j], 1.0;
        hm.selfadjointView<Eigen::Lower>().rankUpdate(jac, wt);
        g += (wt * r) * jac;
      }
    }
    hm.triangularView<Eigen::StrictlyUpper>() = hm.transpose();
    bool accepted = false;
    while (lambda < 1e10) {
      Mat6 a = hm;
      a.diagonal() *= (1.0 + lambda);
      const Vec6 d = a.ldlt().solve(g);
      Params q = p;
      for (int k = 0; k < 6; ++k) q.v[k] += d[k];
      const bool sane = d.allFinite() && q.v[3] > sig_min && q.v[3] < sig_max && q.v[4] > sig_min &&
                        q.v[4] < sig_max;
      if (sane) {
        tabulate(q, w, h);
        const double qchi = chi2(win, q);
        if (qchi <= chi) {
          const bool small = std::abs(d[0]) < tolerance_ && std::abs(d[1]) < tolerance_;
          p = q;
          chi = qchi;
          lambda = std::max(lambda * 0.1, 1e-12);
          accepted = true;
          converged = small;
          break;
        }
      }
      lambda *= 10.0;
    }
    if (!accepted) {
      // Not even a tiny gradient step lowers chi^2: p is the minimum.
      tabulate(p, w, h);
      converged = true;
      break;
    }
    if (converged) break;
  }
  out.x0 = p.v[0];
  out.y0 = p.v[1];
  out.amplitude = p.v[2];
  out.sigma_x = std::abs(p.v[3]);
  out.sigma_y = std::abs(p.v[4]);
  out.constant = p.v[5];
  out.iterations = it;
  const int dof = w * h - 6;
  out.reduced_chi2 = dof > 0 ? chi / dof : 0.0;
  const bool inside = out.x0 > -0.5 && out.x0 < w - 0.5 && out.y0 > -0.5 && out.y0 < h - 0.5;
  out.converged = converged && inside && out.amplitude > 0.0 && std::isfinite(out.x0) && std::isfinite(out.y0);
  return out;
}

SpotEstimate GaussianFitCentroider::measure(const WindowView& win, const WindowContext& c) {
  SpotEstimate e;
  if (!std::isfinite(c.moments.flux)) return e;
  const GaussianFitResult f = fit(win, c);
  if (!std::isfinite(f.x0) || !std::isfinite(f.y0) || f.iterations == 0) return e;
  e.x = f.x0;
  e.y = f.y0;
  e.located = true;
  e.failed = !f.converged;
  e.quality = static_cast<float>(std::min(f.reduced_chi2, 1e9));
  e.fwhm_x = static_cast<float>(kFwhmPerSigma * f.sigma_x);
  e.fwhm_y = static_cast<float>(kFwhmPerSigma * f.sigma_y);
  return e;
}

}  // namespace slopecast::core

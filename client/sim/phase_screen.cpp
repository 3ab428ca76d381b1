#include "client/sim/phase_screen.h"

#include <cmath>
#include <numbers>

#include <fmt/format.h>
#include <opencv2/core.hpp>

#include "daemon/core/modal/turbulence_statistics.h"

namespace slopecast::sim {

using std::numbers::pi;

std::string validate(const PhaseScreenSettings& s) {
  if (s.size < 8 || s.size > 8192) return fmt::format("screen size {} samples is outside 8..8192", s.size);
  if (!(s.dx_m > 0) || !std::isfinite(s.dx_m)) return "the screen sample spacing must be a positive number of metres";
  if (!(s.r0_m > 0) || !std::isfinite(s.r0_m)) return "r0 must be a positive number of metres";
  if (!(s.outer_scale_m > 0)) return "the outer scale L0 must be a positive number of metres";
  if (s.subharmonic_levels < 0 || s.subharmonic_levels > 8)
    return fmt::format("subharmonic levels {} is outside 0..8", s.subharmonic_levels);
  return {};
}

double von_karman_psd(double f, double r0, double L0) { return core::von_karman_psd(f, r0, L0); }

namespace {

// Frequency of FFT index k on an N grid, in units of df.
double fft_index_frequency(int k, int n) { return k <= n / 2 ? k : k - n; }

// The subharmonic components in the order they are drawn: fn(fx, fy,
// cell) for the eight cells of each level around the origin.
template <typename Fn>
void for_each_subharmonic(const PhaseScreenSettings& s, double df, Fn&& fn) {
  for (int p = 1; p <= s.subharmonic_levels; ++p) {
    const double dfp = df / std::pow(3.0, p);
    for (int my = -1; my <= 1; ++my)
      for (int mx = -1; mx <= 1; ++mx)
        if (mx != 0 || my != 0) fn(mx * dfp, my * dfp, dfp);
  }
}

}  // namespace

std::vector<double> make_phase_screen(const PhaseScreenSettings& s, std::mt19937_64& rng) {
  const int n = s.size;
  const double df = 1.0 / (n * s.dx_m);
  std::normal_distribution<double> gauss(0.0, 1.0);
  cv::Mat spectrum(n, n, CV_64FC2);
  for (int ky = 0; ky < n; ++ky) {
    auto* row = spectrum.ptr<cv::Vec2d>(ky);
    const double fy = fft_index_frequency(ky, n) * df;
    for (int kx = 0; kx < n; ++kx) {
      const double fx = fft_index_frequency(kx, n) * df;
      const double a = (kx == 0 && ky == 0) ? 0.0 : std::sqrt(von_karman_psd(std::hypot(fx, fy), s.r0_m, s.outer_scale_m)) * df;
      const double re = gauss(rng), im = gauss(rng);
      row[kx] = {re * a, im * a};
    }
  }
  cv::Mat field;
  // Unscaled inverse DFT: sum_k C_k exp(+2 pi i k x / N), the sum above.
  cv::dft(spectrum, field, cv::DFT_INVERSE);
  std::vector<double> screen(static_cast<std::size_t>(n) * n);
  for (int y = 0; y < n; ++y) {
    const auto* row = field.ptr<cv::Vec2d>(y);
    for (int x = 0; x < n; ++x) screen[static_cast<std::size_t>(y) * n + x] = row[x][0];
  }
  if (s.subharmonic_levels > 0) {
    std::vector<double> low(screen.size(), 0.0);
    std::vector<double> cx(n), sx(n), cy(n), sy(n);
    for_each_subharmonic(s, df, [&](double fx, double fy, double dfp) {
      const double a = std::sqrt(von_karman_psd(std::hypot(fx, fy), s.r0_m, s.outer_scale_m)) * dfp;
      const double re = gauss(rng) * a, im = gauss(rng) * a;
      // Re((re + i im) exp(i(ax + by))) = re cos(ax+by) - im sin(ax+by),
      // separated in x and y so that no cos is taken per pixel.
      for (int i = 0; i < n; ++i) {
        cx[i] = std::cos(2 * pi * fx * i * s.dx_m);
        sx[i] = std::sin(2 * pi * fx * i * s.dx_m);
        cy[i] = std::cos(2 * pi * fy * i * s.dx_m);
        sy[i] = std::sin(2 * pi * fy * i * s.dx_m);
      }
      for (int y = 0; y < n; ++y)
        for (int x = 0; x < n; ++x) {
          const double c = cx[x] * cy[y] - sx[x] * sy[y];
          const double sn = sx[x] * cy[y] + cx[x] * sy[y];
          low[static_cast<std::size_t>(y) * n + x] += re * c - im * sn;
        }
    });
    double mean = 0.0;
    for (double v : low) mean += v;
    mean /= static_cast<double>(low.size());
    for (std::size_t i = 0; i < screen.size(); ++i) screen[i] += low[i] - mean;
  }
  return screen;
}

double sampled_structure_function(const PhaseScreenSettings& s, double r) {
  const int n = s.size;
  const double df = 1.0 / (n * s.dx_m);
  double sum = 0.0;
  for (int ky = 0; ky < n; ++ky) {
    const double fy = fft_index_frequency(ky, n) * df;
    for (int kx = 0; kx < n; ++kx) {
      if (kx == 0 && ky == 0) continue;
      const double fx = fft_index_frequency(kx, n) * df;
      sum += von_karman_psd(std::hypot(fx, fy), s.r0_m, s.outer_scale_m) * df * df *
             (1.0 - std::cos(2 * pi * fx * r * s.dx_m));
    }
  }
  for_each_subharmonic(s, df, [&](double fx, double fy, double dfp) {
    sum += von_karman_psd(std::hypot(fx, fy), s.r0_m, s.outer_scale_m) * dfp * dfp *
           (1.0 - std::cos(2 * pi * fx * r * s.dx_m));
  });
  // The mean removed from the subharmonic part changes the covariance of
  // two points only by terms that cancel in their difference.
  return 2.0 * sum;
}

double von_karman_structure_function(double r, double r0, double L0) {
  // Integrate in u = ln f with Simpson's rule, from far below 1/L0 and 1/r
  // to far above 1/r (the integrand falls as f^(-5/3) there, the tail
  // beyond is added analytically with J0 averaged to 0).
  const double f_lo = std::min(1.0 / L0, 1.0 / r) * 1e-4;
  const double f_hi = 1e3 / r;
  const int steps = 20000;
  const double u0 = std::log(f_lo), u1 = std::log(f_hi), h = (u1 - u0) / steps;
  auto g = [&](double u) {
    const double f = std::exp(u);
    return f * f * von_karman_psd(f, r0, L0) * (1.0 - std::cyl_bessel_j(0.0, 2 * pi * f * r));
  };
  double sum = g(u0) + g(u1);
  for (int i = 1; i < steps; ++i) sum += g(u0 + i * h) * (i % 2 ? 4.0 : 2.0);
  double integral = sum * h / 3.0;
  // Tail: int_{f_hi}^inf f Phi df with Phi ~ 0.023 r0^-5/3 f^-11/3.
  integral += 0.023 * std::pow(r0, -5.0 / 3.0) * std::pow(f_hi, -5.0 / 3.0) / (5.0 / 3.0);
  return 4 * pi * integral;
}

}  // namespace slopecast::sim

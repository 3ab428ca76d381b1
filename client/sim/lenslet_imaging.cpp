#include "client/sim/lenslet_imaging.h"

#include <cmath>
#include <numbers>

#include <fmt/format.h>
#include <opencv2/core.hpp>
#include <opencv2/imgproc.hpp>

namespace slopecast::sim {

using std::numbers::pi;

int samples_per_subaperture(const LensletOptics& o, const core::LensletGrid& grid) {
  if (o.samples_per_subaperture > 0) return o.samples_per_subaperture;
  return std::max(8, static_cast<int>(std::ceil(2.0 * grid.pitch_px / o.pixels_per_lambda_over_d)));
}

std::string validate(const LensletOptics& o, const core::LensletGrid& grid) {
  if (!(o.pixels_per_lambda_over_d >= 0.5 && o.pixels_per_lambda_over_d <= 64))
    return fmt::format("pixels per lambda/d {} is outside 0.5..64", o.pixels_per_lambda_over_d);
  if (o.samples_per_subaperture < 0 || o.samples_per_subaperture > 256)
    return fmt::format("samples per subaperture {} is outside 0 (automatic)..256", o.samples_per_subaperture);
  if (o.oversampling < 1 || o.oversampling > 15) return fmt::format("oversampling {} is outside 1..15", o.oversampling);
  if (!(o.source_sigma_px >= 0 && o.source_sigma_px <= grid.pitch_px))
    return fmt::format("source sigma {} px is outside 0..pitch ({} px)", o.source_sigma_px, grid.pitch_px);
  const int n = samples_per_subaperture(o, grid);
  if (n * o.pixels_per_lambda_over_d < 2.0 * grid.pitch_px)
    return fmt::format("{} samples per subaperture at {} px per lambda/d repeat the spot every {} px, closer than "
                       "twice the box ({} px): use more samples",
                       n, o.pixels_per_lambda_over_d, n * o.pixels_per_lambda_over_d, 2 * grid.pitch_px);
  return {};
}

LensletImager::LensletImager(const LensletOptics& optics, const core::LensletGrid& grid)
    : optics_(optics), grid_(grid), n_(samples_per_subaperture(optics, grid)), m_(grid.pitch_px * optics.oversampling) {
  kernel_.resize(m_, n_);
  const double q = optics_.pixels_per_lambda_over_d;
  for (int k = 0; k < m_; ++k) {
    // Point k's position from the box centre, px: pixel k / os, sub-point
    // k % os at the midpoints of os equal slices.
    const double xi = (k + 0.5) / optics_.oversampling - grid_.pitch_px / 2.0;
    for (int a = 0; a < n_; ++a)
      kernel_(k, a) = std::polar(1.0, -2 * pi * (a - (n_ - 1) / 2.0) * xi / (n_ * q));
  }
  field_.resize(n_, n_);
  fine_.resize(static_cast<std::size_t>(m_) * m_);
}

void LensletImager::image(std::span<const double> phase, std::span<const double> amplitude, double photons,
                          std::span<double> image_e, int image_width, SubapertureTruth& truth) {
  const int nx = grid_.n_subap_x, ny = grid_.n_subap_y, pw = pupil_width();
  const std::size_t count = static_cast<std::size_t>(nx) * ny;
  truth.dx_px.assign(count, 0.0);
  truth.dy_px.assign(count, 0.0);
  truth.illuminated.assign(count, 0.0);
  const double q = optics_.pixels_per_lambda_over_d;
  const double to_px = n_ * q / (2 * pi);
  const int os = optics_.oversampling, p = grid_.pitch_px;
  // Per pixel: the mean of os^2 points, as a share of the full
  // subaperture's energy over one period, (n q)^2 n^2.
  const double scale = photons / (static_cast<double>(os) * os) / (n_ * q * n_ * q) / (static_cast<double>(n_) * n_);
  for (int iy = 0; iy < ny; ++iy)
    for (int ix = 0; ix < nx; ++ix) {
      const std::size_t s = static_cast<std::size_t>(iy) * nx + ix;
      double light = 0.0, gx = 0.0, gy = 0.0;
      int cx = 0, cy = 0;
      for (int b = 0; b < n_; ++b)
        for (int a = 0; a < n_; ++a) {
          const std::size_t at = static_cast<std::size_t>(iy * n_ + b) * pw + ix * n_ + a;
          const double amp = amplitude[at];
          field_(b, a) = std::polar(amp, phase[at]);
          light += amp * amp;
          if (amp > 0 && a + 1 < n_ && amplitude[at + 1] > 0) {
            gx += phase[at + 1] - phase[at];
            ++cx;
          }
          if (amp > 0 && b + 1 < n_ && amplitude[at + pw] > 0) {
            gy += phase[at + pw] - phase[at];
            ++cy;
          }
        }
      truth.illuminated[s] = light / (static_cast<double>(n_) * n_);
      if (light == 0.0) continue;
      truth.dx_px[s] = cx ? gx / cx * to_px : 0.0;
      truth.dy_px[s] = cy ? gy / cy * to_px : 0.0;
      half_.noalias() = field_ * kernel_.transpose();  // n x m: rows b, far-field columns
      far_.noalias() = kernel_ * half_;                // m x m: far-field rows, columns
      for (int r = 0; r < m_; ++r)
        for (int c = 0; c < m_; ++c) fine_[static_cast<std::size_t>(r) * m_ + c] = static_cast<float>(std::norm(far_(r, c)));
      if (optics_.source_sigma_px > 0) {
        cv::Mat f(m_, m_, CV_32F, fine_.data());
        cv::GaussianBlur(f, f, cv::Size(0, 0), optics_.source_sigma_px * os, 0, cv::BORDER_CONSTANT);
      }
      const int x0 = grid_.origin_x_px + ix * p, y0 = grid_.origin_y_px + iy * p;
      for (int py = 0; py < p; ++py)
        for (int px = 0; px < p; ++px) {
          double sum = 0.0;
          for (int sy = 0; sy < os; ++sy)
            for (int sx = 0; sx < os; ++sx) sum += fine_[static_cast<std::size_t>(py * os + sy) * m_ + px * os + sx];
          image_e[static_cast<std::size_t>(y0 + py) * image_width + x0 + px] += sum * scale;
        }
    }
}

}  // namespace slopecast::sim

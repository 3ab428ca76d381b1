#include "daemon/core/modal/turbulence_statistics.h"

#include <algorithm>
#include <cmath>
#include <numbers>

#include <fmt/format.h>

namespace slopecast::core {

using std::numbers::pi;

double von_karman_psd(double f, double r0, double L0) {
  return 0.023 * std::pow(r0, -5.0 / 3.0) * std::pow(f * f + 1.0 / (L0 * L0), -11.0 / 6.0);
}

namespace {

double sinc(double x) { return x == 0 ? 1.0 : std::sin(pi * x) / (pi * x); }

double aperture_filter(double fx, double fy, ApertureShape shape) {
  if (shape == ApertureShape::kSquare) return sinc(fx) * sinc(fy);
  const double x = pi * std::hypot(fx, fy);
  return x < 1e-12 ? 1.0 : 2 * std::cyl_bessel_j(1.0, x) / x;
}

}  // namespace

double differential_tilt_coefficient(double b, bool longitudinal, ApertureShape shape, double L0) {
  // Polar coordinates; the integrand is even in f_x and f_y, so a quarter
  // plane times 4. ln f from far below 1 to 200 (the tail beyond adds
  // ~1e-4 relative).
  const int nu = 3000, nt = 180;
  const double u0 = std::log(1e-4), u1 = std::log(200.0), h = (u1 - u0) / nu;
  double total = 0;
  for (int i = 0; i <= nu; ++i) {
    const double f = std::exp(u0 + i * h);
    const double w = (i == 0 || i == nu) ? 1.0 : (i % 2 ? 4.0 : 2.0);
    double ring = 0;
    for (int k = 0; k < nt; ++k) {
      const double t = (k + 0.5) * (pi / 2) / nt;
      const double fx = f * std::cos(t), fy = f * std::sin(t);
      const double a = aperture_filter(fx, fy, shape);
      const double axis = longitudinal ? fx : fy;
      const double s = std::sin(pi * fx * b);
      ring += (2 * pi * axis) * (2 * pi * axis) * a * a * 4 * s * s;
    }
    ring *= (pi / 2) / nt * 4;  // d theta, four quadrants
    total += w * f * f * von_karman_psd(f, 1.0, L0) * ring;  // f df = f^2 du
  }
  return total * h / 3 / (4 * pi * pi);
}

double zernike_variance_coefficient(int j, double L0) {
  int n = 0;
  while (j > (n + 1) * (n + 2) / 2) ++n;
  const int steps = 20000;
  const double u0 = std::log(std::min(1e-9, 1e-3 / L0)), u1 = std::log(1e3), h = (u1 - u0) / steps;
  auto g = [&](double u) {
    const double f = std::exp(u), x = pi * f;
    const double q = 2 * std::cyl_bessel_j(n + 1.0, x) / x;
    return f * 2 * pi * f * von_karman_psd(f, 1.0, L0) * (n + 1) * q * q;
  };
  double sum = g(u0) + g(u1);
  for (int i = 1; i < steps; ++i) sum += g(u0 + i * h) * (i % 2 ? 4 : 2);
  return sum * h / 3;
}

double seeing_arcsec(double wavelength_m, double r0_m) {
  return 0.98 * wavelength_m / r0_m * 180.0 / pi * 3600.0;
}

double r0_at(double r0_m, double from, double to) { return r0_m * std::pow(to / from, 6.0 / 5.0); }

std::vector<SubaperturePair> lattice_pairs(const std::vector<SubapertureBox>& boxes,
                                           std::span<const std::uint8_t> used, int max_separation) {
  std::vector<SubaperturePair> out;
  if (boxes.empty()) return out;
  // The pitch: the median box width (boxes are a pitch wide).
  std::vector<int> widths;
  for (const auto& b : boxes) widths.push_back(b.width);
  std::nth_element(widths.begin(), widths.begin() + widths.size() / 2, widths.end());
  const double pitch = widths[widths.size() / 2];
  auto cx = [&](int i) { return boxes[i].x0 + boxes[i].width / 2.0; };
  auto cy = [&](int i) { return boxes[i].y0 + boxes[i].height / 2.0; };
  const int n = static_cast<int>(boxes.size());
  for (int a = 0; a < n; ++a) {
    if (!used[a]) continue;
    for (int b = 0; b < n; ++b) {
      if (!used[b] || a == b) continue;
      const double dx = (cx(b) - cx(a)) / pitch, dy = (cy(b) - cy(a)) / pitch;
      for (int k = 1; k <= max_separation; ++k) {
        if (std::fabs(dx - k) < 0.25 && std::fabs(dy) < 0.25) out.push_back({a, b, k, true});
        if (std::fabs(dy - k) < 0.25 && std::fabs(dx) < 0.25) out.push_back({a, b, k, false});
      }
    }
  }
  return out;
}

DifferentialMotion::DifferentialMotion(const std::vector<SubapertureBox>& boxes, std::span<const std::uint8_t> used,
                                       double subaperture_m, double outer_scale_m, int window, int max_separation)
    : pairs_(lattice_pairs(boxes, used, max_separation)),
      d_(subaperture_m),
      n_(static_cast<int>(boxes.size())),
      window_(window),
      max_sep_(max_separation) {
  for (int k = 1; k <= max_separation; ++k) {
    k_longitudinal_.push_back(differential_tilt_coefficient(k, true, ApertureShape::kSquare, outer_scale_m / d_));
    k_transverse_.push_back(differential_tilt_coefficient(k, false, ApertureShape::kSquare, outer_scale_m / d_));
  }
  x_.assign(static_cast<std::size_t>(window_) * n_, 0.0f);
  y_.assign(x_.size(), 0.0f);
  valid_.assign(x_.size(), 0);
}

void DifferentialMotion::clear() {
  filled_ = 0;
  next_ = 0;
}

void DifferentialMotion::add(std::span<const double> ox, std::span<const double> oy,
                             std::span<const std::uint8_t> valid) {
  const std::size_t at = static_cast<std::size_t>(next_) * n_;
  for (int i = 0; i < n_; ++i) {
    x_[at + i] = static_cast<float>(ox[i] / d_);  // angle, rad
    y_[at + i] = static_cast<float>(oy[i] / d_);
    valid_[at + i] = valid[i];
  }
  next_ = (next_ + 1) % window_;
  filled_ = std::min<long>(filled_ + 1, window_);
}

void DifferentialMotion::temporal_variance(std::span<double> vx, std::span<double> vy) const {
  for (int i = 0; i < n_; ++i) {
    double sx = 0, sy = 0, sx2 = 0, sy2 = 0;
    long m = 0;
    for (long f = 0; f < filled_; ++f) {
      const std::size_t at = static_cast<std::size_t>(f) * n_ + i;
      if (!valid_[at]) continue;
      const double x = static_cast<double>(x_[at]) * d_, y = static_cast<double>(y_[at]) * d_;
      sx += x;
      sy += y;
      sx2 += x * x;
      sy2 += y * y;
      ++m;
    }
    vx[i] = m > 1 ? (sx2 - sx * sx / m) / (m - 1) : 0.0;
    vy[i] = m > 1 ? (sy2 - sy * sy / m) / (m - 1) : 0.0;
  }
}

DifferentialR0 DifferentialMotion::estimate(double lambda, long min_frames, double noise_opd_m2) const {
  DifferentialR0 r;
  r.frames = filled_;
  if (filled_ < min_frames) {
    r.refused = fmt::format("{} frames in the window, fewer than the {} an estimate needs", filled_, min_frames);
    return r;
  }
  if (pairs_.size() < 10) {
    r.refused = fmt::format("{} subaperture pairs, fewer than 10 (too few valid subapertures)", pairs_.size());
    return r;
  }
  const double noise_angle2 = 2 * noise_opd_m2 / (d_ * d_);
  // Per class (separation, longitudinal or transverse): the mean over
  // pairs of each pair's variance over time (around its own mean, which
  // removes static differences).
  std::vector<double> var_l(max_sep_, 0), var_t(max_sep_, 0);
  std::vector<long> cnt_l(max_sep_, 0), cnt_t(max_sep_, 0);
  long used_pairs = 0;
  for (const auto& p : pairs_) {
    for (int comp = 0; comp < 2; ++comp) {
      const std::vector<float>& s = comp == 0 ? x_ : y_;
      double sum = 0, sum2 = 0;
      long m = 0;
      for (long f = 0; f < filled_; ++f) {
        const std::size_t at = static_cast<std::size_t>(f) * n_;
        if (!valid_[at + p.a] || !valid_[at + p.b]) continue;
        const double d = static_cast<double>(s[at + p.b]) - s[at + p.a];
        sum += d;
        sum2 += d * d;
        ++m;
      }
      if (m < min_frames) continue;
      const double var = (sum2 - sum * sum / m) / (m - 1) - noise_angle2;
      // Longitudinal: the slope along the separation.
      const bool longitudinal = (comp == 0) == p.along_x;
      (longitudinal ? var_l : var_t)[p.separation - 1] += var;
      ++(longitudinal ? cnt_l : cnt_t)[p.separation - 1];
      if (comp == 0) ++used_pairs;
    }
  }
  r.pairs = used_pairs;
  if (used_pairs < 10) {
    r.refused = fmt::format("{} pairs valid in {} or more frames, fewer than 10", used_pairs, min_frames);
    return r;
  }
  // r0^(-5/3) = sigma^2 / (K lambda^2 d^(-1/3)), averaged over classes.
  const double scale = lambda * lambda * std::pow(d_, -1.0 / 3.0);
  double sum_l = 0, sum_t = 0;
  int classes_l = 0, classes_t = 0;
  for (int k = 0; k < max_sep_; ++k) {
    if (cnt_l[k]) {
      sum_l += var_l[k] / cnt_l[k] / (k_longitudinal_[k] * scale);
      ++classes_l;
    }
    if (cnt_t[k]) {
      sum_t += var_t[k] / cnt_t[k] / (k_transverse_[k] * scale);
      ++classes_t;
    }
  }
  if (!classes_l || !classes_t || sum_l <= 0 || sum_t <= 0) {
    r.refused = "the differential variances are not positive (noise larger than the turbulence?)";
    return r;
  }
  r.r0_longitudinal_m = std::pow(sum_l / classes_l, -3.0 / 5.0);
  r.r0_transverse_m = std::pow(sum_t / classes_t, -3.0 / 5.0);
  r.r0_m = std::pow((sum_l + sum_t) / (classes_l + classes_t), -3.0 / 5.0);
  r.ok = true;
  return r;
}

}  // namespace slopecast::core

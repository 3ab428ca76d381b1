#include "client/sim/turbulence_sim.h"

#include <cmath>
#include <numbers>

#include <fmt/format.h>

#include "daemon/core/modal/zernike.h"

namespace slopecast::sim {

using std::numbers::pi;

namespace {

double subaperture_size(const TurbulenceScene& s, const core::LensletGrid& g) {
  return s.subaperture_m > 0 ? s.subaperture_m : s.pupil_diameter_m / g.n_subap_x;
}

}  // namespace

std::string validate(const TurbulenceScene& s, const core::LensletGrid& grid) {
  if (auto e = validate(s.optics, grid); !e.empty()) return e;
  if (!(s.r0_m > 0 && s.r0_m < 1e3)) return "r0 must be a positive number of metres";
  if (!(s.r0_wavelength_nm > 0) || !(s.wavelength_nm > 0)) return "wavelengths must be positive numbers of nm";
  if (!(s.outer_scale_m > 0)) return "the outer scale must be a positive number of metres";
  if (s.subharmonic_levels < 0 || s.subharmonic_levels > 8) return "subharmonic levels must be 0..8";
  if (s.screen_samples != 0 && (s.screen_samples < 16 || s.screen_samples > 8192))
    return fmt::format("screen samples {} is outside 16..8192 (or 0: automatic)", s.screen_samples);
  if (!(s.path_s >= 0)) return "the path duration must be non-negative";
  double total = 0.0;
  for (const auto& l : s.layers) {
    if (!(l.fraction > 0)) return "every layer's fraction must be positive";
    if (!(l.wind_m_per_s >= 0 && l.wind_m_per_s < 1000)) return "wind speeds must be 0..1000 m/s";
    if (!std::isfinite(l.wind_direction_deg)) return "wind directions must be numbers of degrees";
    total += l.fraction;
  }
  if (!s.layers.empty() && !std::isfinite(total)) return "layer fractions must be finite";
  if (!(s.pupil_diameter_m > 0)) return "the pupil diameter must be a positive number of metres";
  if (!(s.obstruction >= 0 && s.obstruction < 1)) return "the obstruction must be a fraction 0..1 of the diameter";
  if (s.subaperture_m < 0) return "the subaperture size must be positive (or 0: automatic)";
  if (s.zernike_nm.size() > 231) return "static aberrations go up to Noll j = 231 (radial order 20)";
  for (double z : s.zernike_nm)
    if (!std::isfinite(z)) return "Zernike coefficients must be numbers of nm";
  {
    const int pupil = samples_per_subaperture(s.optics, grid) * std::max(grid.n_subap_x, grid.n_subap_y);
    if (s.screen_samples != 0 && s.screen_samples < pupil + 2)
      return fmt::format("a screen of {} samples cannot hold the pupil's {} samples", s.screen_samples, pupil);
    if (pupil + 2 > 2048 && s.screen_samples == 0)
      return fmt::format("the pupil needs {} samples across, more than the largest automatic screen (2048)", pupil);
  }
  if (!(s.photons_per_subaperture >= 0) || !(s.background_e_per_px >= 0) || !(s.dark_current_e_per_px >= 0))
    return "photons, background and dark current must be non-negative";
  if (!(s.rate_hz > 0)) return "the rate must be positive";
  return {};
}

TurbulenceSim::TurbulenceSim(const TurbulenceScene& scene, const core::LensletGrid& grid, std::uint64_t seed)
    : scene_(scene), grid_(grid), imager_(scene.optics, grid) {
  const int n = imager_.samples();
  dx_ = subaperture_size(scene, grid) / n;
  const int pw = pupil_width(), ph = pupil_height();
  // Pupil mask and static phase, sampled at sample centres; the pupil is
  // centred on the lenslet array.
  amplitude_.assign(static_cast<std::size_t>(pw) * ph, 0.0);
  static_phase_.assign(amplitude_.size(), 0.0);
  const double radius = scene.pupil_diameter_m / 2, inner = radius * scene.obstruction;
  const double to_rad = 2 * pi / (scene.wavelength_nm * 1e-9);
  for (int y = 0; y < ph; ++y)
    for (int x = 0; x < pw; ++x) {
      const double px = (x + 0.5 - pw / 2.0) * dx_, py = (y + 0.5 - ph / 2.0) * dx_;
      const double r = std::hypot(px, py);
      const std::size_t i = static_cast<std::size_t>(y) * pw + x;
      if (r <= radius && r >= inner) amplitude_[i] = 1.0;
      if (r <= radius) {
        double opd_nm = 0.0;
        for (std::size_t j = 0; j < scene.zernike_nm.size(); ++j)
          if (scene.zernike_nm[j] != 0.0)
            opd_nm += scene.zernike_nm[j] * core::zernike(static_cast<int>(j + 1), r / radius, std::atan2(py, px));
        static_phase_[i] = opd_nm * 1e-9 * to_rad;
      }
    }
  if (scene.layers.empty()) return;
  // Long enough for the pupil's path over path_s at the fastest wind, and
  // at least 4 pupils (the low orders), at most 2048 samples.
  double fastest = 0.0;
  for (const auto& l : scene.layers) fastest = std::max(fastest, l.wind_m_per_s);
  const int path = static_cast<int>(std::ceil(fastest * scene.path_s / dx_));
  screen_n_ = scene.screen_samples ? scene.screen_samples
                                   : std::min(2048, std::max(4 * std::max(pw, ph), std::max(pw, ph) + path + 2));
  double total = 0.0;
  for (const auto& l : scene.layers) total += l.fraction;
  std::mt19937_64 rng(seed);
  const double scale = scene.r0_wavelength_nm / scene.wavelength_nm;
  for (const auto& l : scene.layers) {
    PhaseScreenSettings ps;
    ps.size = screen_n_;
    ps.dx_m = dx_;
    ps.r0_m = scene.r0_m * std::pow(l.fraction / total, -3.0 / 5.0);
    ps.outer_scale_m = scene.outer_scale_m;
    ps.subharmonic_levels = scene.subharmonic_levels;
    auto screen = make_phase_screen(ps, rng);  // rad at the r0 wavelength
    for (double& v : screen) v *= scale;
    screens_.push_back(std::move(screen));
  }
}

void TurbulenceSim::phase(std::uint64_t k, std::vector<double>& out) const {
  const int pw = pupil_width(), ph = pupil_height(), n = screen_n_;
  out = static_phase_;
  const double t = static_cast<double>(k) / scene_.rate_hz;
  // Room for the window's corner: 0..span (the window and one sample for
  // the interpolation fit inside the screen).
  const double span_x = n - pw - 1, span_y = n - ph - 1;
  // From the far end for a negative travel, the near end for a positive
  // one, the middle when still; folded back and forth into [0, span].
  auto fold = [t](double span, double rate) {
    double p = (rate < 0 ? span : rate > 0 ? 0.0 : span / 2) + rate * t;
    const double period = 2 * span;
    p -= std::floor(p / period) * period;
    return p <= span ? p : period - p;
  };
  for (std::size_t l = 0; l < screens_.size(); ++l) {
    const auto& layer = scene_.layers[l];
    const auto& screen = screens_[l];
    const double dir = layer.wind_direction_deg * pi / 180;
    // The pupil sees the screen at x - v t: its window on the screen moves
    // against the wind, starting at the far edge, and turns back at each
    // edge (a continuous path: no seam crosses the pupil).
    const double sx = fold(span_x, -layer.wind_m_per_s * std::cos(dir) / dx_);
    const double sy = fold(span_y, -layer.wind_m_per_s * std::sin(dir) / dx_);
    const int ix = static_cast<int>(std::floor(sx)), iy = static_cast<int>(std::floor(sy));
    const double fx = sx - ix, fy = sy - iy;
    for (int y = 0; y < ph; ++y) {
      const int y0 = y + iy, y1 = std::min(y0 + 1, n - 1);
      for (int x = 0; x < pw; ++x) {
        const int x0 = x + ix, x1 = std::min(x0 + 1, n - 1);
        const double v = (1 - fy) * ((1 - fx) * screen[static_cast<std::size_t>(y0) * n + x0] +
                                     fx * screen[static_cast<std::size_t>(y0) * n + x1]) +
                         fy * ((1 - fx) * screen[static_cast<std::size_t>(y1) * n + x0] +
                               fx * screen[static_cast<std::size_t>(y1) * n + x1]);
        out[static_cast<std::size_t>(y) * pw + x] += v;
      }
    }
  }
}

void TurbulenceSim::render(std::uint64_t k, std::span<double> image_e, int image_width, int image_height,
                           SubapertureTruth& truth) {
  phase(k, phase_);
  const double floor_e = scene_.background_e_per_px + scene_.dark_current_e_per_px;
  std::fill(image_e.begin(), image_e.begin() + static_cast<std::ptrdiff_t>(image_width) * image_height, floor_e);
  imager_.image(phase_, amplitude_, scene_.photons_per_subaperture, image_e, image_width, truth);
}

}  // namespace slopecast::sim

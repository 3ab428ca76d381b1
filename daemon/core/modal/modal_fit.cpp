#include "daemon/core/modal/modal_fit.h"

#include <cmath>
#include <numbers>

#include <fmt/format.h>

#include "daemon/core/modal/zernike.h"

namespace slopecast::core {

namespace {

// Z_j at Cartesian (x, y) on the unit disc.
double zernike_xy(int j, double x, double y) { return zernike(j, std::hypot(x, y), std::atan2(y, x)); }

}  // namespace

std::variant<ModalFit, std::string> ModalFit::make(const std::vector<SubapertureBox>& boxes,
                                                   std::span<const std::uint8_t> used, const PupilSpec& pupil,
                                                   int max_noll) {
  if (auto e = validate(pupil); !e.empty()) return e;
  if (pupil.diameter_px <= 0) return std::string("the modal fit needs the pupil's diameter on the camera");
  if (max_noll < 2 || max_noll > 231) return fmt::format("Zernike modes up to j = {}: expected 2..231", max_noll);
  if (used.size() != boxes.size())
    return fmt::format("{} usable flags for {} subapertures", used.size(), boxes.size());
  ModalFit f;
  f.max_noll_ = max_noll;
  f.used_.assign(used.begin(), used.end());
  for (std::size_t i = 0; i < boxes.size(); ++i)
    if (used[i]) f.rows_.push_back(static_cast<int>(i));
  const int u = static_cast<int>(f.rows_.size()), m = max_noll - 1;
  if (2 * u < m)
    return fmt::format("{} subapertures give {} slopes, fewer than the {} modes asked for", u, 2 * u, m);
  const double radius = pupil.diameter_px / 2, inner = radius * pupil.obstruction;
  constexpr int kPoints = 16;
  constexpr double h = 1e-6;  // central differences on polynomials: error ~h^2
  f.interaction_.setZero(2 * u, m);
  for (int r = 0; r < u; ++r) {
    const SubapertureBox& b = boxes[f.rows_[r]];
    int lit = 0;
    for (int py = 0; py < kPoints; ++py)
      for (int px = 0; px < kPoints; ++px) {
        const double x = b.x0 + (px + 0.5) * b.width / kPoints, y = b.y0 + (py + 0.5) * b.height / kPoints;
        const double rr = std::hypot(x - pupil.centre_x_px, y - pupil.centre_y_px);
        if (rr > radius || rr < inner) continue;
        ++lit;
        const double rx = (x - pupil.centre_x_px) / radius, ry = (y - pupil.centre_y_px) / radius;
        for (int j = 2; j <= max_noll; ++j) {
          f.interaction_(2 * r, j - 2) += (zernike_xy(j, rx + h, ry) - zernike_xy(j, rx - h, ry)) / (2 * h);
          f.interaction_(2 * r + 1, j - 2) += (zernike_xy(j, rx, ry + h) - zernike_xy(j, rx, ry - h)) / (2 * h);
        }
      }
    if (lit == 0) {
      return fmt::format("subaperture {} (box at {}, {}) lies outside the pupil: leave it out of the fit",
                         f.rows_[r], b.x0, b.y0);
    }
    f.interaction_.row(2 * r) *= static_cast<double>(b.width) / radius / lit;
    f.interaction_.row(2 * r + 1) *= static_cast<double>(b.height) / radius / lit;
  }
  Eigen::CompleteOrthogonalDecomposition<Eigen::MatrixXd> cod(f.interaction_);
  if (cod.rank() < m)
    return fmt::format("the {} subapertures cannot tell {} Zernike modes apart (rank {}); ask for fewer modes", u,
                       m, cod.rank());
  f.reconstructor_ = cod.pseudoInverse();
  f.slopes_.resize(2 * u);
  f.coeffs_.resize(m);
  return f;
}

void ModalFit::fit(std::span<const float> sx, std::span<const float> sy, double opd_per_px,
                   std::span<double> out) const {
  for (std::size_t r = 0; r < rows_.size(); ++r) {
    slopes_(2 * r) = sx[rows_[r]] * opd_per_px;
    slopes_(2 * r + 1) = sy[rows_[r]] * opd_per_px;
  }
  coeffs_.noalias() = reconstructor_ * slopes_;
  for (int k = 0; k < coeffs_.size(); ++k) out[k] = coeffs_(k);
}

void ModalFit::slopes_of(std::span<const double> a, double opd_per_px, std::span<float> sx,
                         std::span<float> sy) const {
  std::fill(sx.begin(), sx.end(), 0.0f);
  std::fill(sy.begin(), sy.end(), 0.0f);
  const Eigen::Map<const Eigen::VectorXd> c(a.data(), mode_count());
  const Eigen::VectorXd s = interaction_ * c;
  for (std::size_t r = 0; r < rows_.size(); ++r) {
    sx[rows_[r]] = static_cast<float>(s(2 * r) / opd_per_px);
    sy[rows_[r]] = static_cast<float>(s(2 * r + 1) / opd_per_px);
  }
}

double wavefront_rms(std::span<const double> a, int first_j) {
  double sum = 0;
  for (std::size_t k = 0; k < a.size(); ++k)
    if (static_cast<int>(k) + 2 >= first_j) sum += a[k] * a[k];
  return std::sqrt(sum);
}

double strehl_estimate(double rms, double wavelength) {
  const double phase = 2 * std::numbers::pi * rms / wavelength;
  return std::exp(-phase * phase);
}

}  // namespace slopecast::core

#include "daemon/core/geometry/registration.h"

#include <algorithm>
#include <cmath>
#include <map>
#include <numbers>
#include <utility>

#include <Eigen/Dense>
#include <fmt/format.h>

namespace slopecast::core {

std::string validate(const RegistrationSettings& s) {
  if (s.box_px != 0 && (s.box_px < 2 || s.box_px > 1024))
    return fmt::format("box_px must be 0 (the pitch, rounded down) or 2..1024, got {}", s.box_px);
  if (!(s.detect_snr > 0.0) || !std::isfinite(s.detect_snr))
    return fmt::format("detect_snr must be a finite number > 0, got {}", s.detect_snr);
  if (!(s.min_peak_fraction >= 0.0 && s.min_peak_fraction < 1.0))
    return fmt::format("min_peak_fraction must be 0 <= f < 1, got {}", s.min_peak_fraction);
  return {};
}

namespace {

struct Spot {
  double x = 0.0, y = 0.0;
  int i = 0, j = 0;
  bool assigned = false;
};

// The lattice model x = ox + c i - d j, y = oy + d i + c j.
struct Lattice {
  double ox = 0.0, oy = 0.0, c = 0.0, d = 0.0;
  double x(double i, double j) const { return ox + c * i - d * j; }
  double y(double i, double j) const { return oy + d * i + c * j; }
  // Lattice coordinates (not rounded) of a point.
  std::pair<double, double> index_of(double x, double y) const {
    const double p2 = c * c + d * d, dx = x - ox, dy = y - oy;
    return {(c * dx + d * dy) / p2, (-d * dx + c * dy) / p2};
  }
};

double median_of(std::vector<double> v) {
  if (v.empty()) return 0.0;
  const auto mid = v.begin() + static_cast<std::ptrdiff_t>(v.size() / 2);
  std::nth_element(v.begin(), mid, v.end());
  return *mid;
}

// Centre of gravity of the (2 half + 1)^2 window on (cx, cy), clipped to the
// image, with `bg` removed from every pixel. False when it holds no light.
bool window_cog(std::span<const float> img, int w, int h, int cx, int cy, int half, double bg, double& x,
                double& y) {
  double s = 0.0, sx = 0.0, sy = 0.0;
  for (int yy = std::max(0, cy - half); yy <= std::min(h - 1, cy + half); ++yy)
    for (int xx = std::max(0, cx - half); xx <= std::min(w - 1, cx + half); ++xx) {
      const double v = img[static_cast<std::size_t>(yy) * w + xx] - bg;
      s += v;
      sx += v * xx;
      sy += v * yy;
    }
  if (!(s > 0.0)) return false;
  x = sx / s;
  y = sy / s;
  return true;
}

// Least-squares lattice through the assigned spots (Eigen, normal
// equations of the 4-parameter linear model; indices are small integers,
// so the 4 x 4 system is well conditioned).
bool fit_lattice(const std::vector<Spot>& spots, Lattice& out) {
  Eigen::Matrix4d ata = Eigen::Matrix4d::Zero();
  Eigen::Vector4d atb = Eigen::Vector4d::Zero();
  int n = 0;
  for (const Spot& s : spots) {
    if (!s.assigned) continue;
    const Eigen::Vector4d rx(1.0, 0.0, s.i, -s.j), ry(0.0, 1.0, s.j, s.i);
    ata += rx * rx.transpose() + ry * ry.transpose();
    atb += rx * s.x + ry * s.y;
    ++n;
  }
  if (n < 3) return false;
  const Eigen::Vector4d p = ata.ldlt().solve(atb);
  if (!p.allFinite()) return false;
  out = {p[0], p[1], p[2], p[3]};
  return out.c * out.c + out.d * out.d > 0.0;
}

// Gives each spot within `radius` pitches of the lattice origin the nearest
// lattice index, one spot per index (the closest), none to a spot further
// than 0.35 pitch from every lattice point.
void assign(std::vector<Spot>& spots, const Lattice& l, double radius) {
  std::map<std::pair<int, int>, std::pair<double, std::size_t>> best;
  for (std::size_t k = 0; k < spots.size(); ++k) {
    spots[k].assigned = false;
    const auto [u, v] = l.index_of(spots[k].x, spots[k].y);
    if (std::hypot(u, v) > radius) continue;
    const int i = static_cast<int>(std::lround(u)), j = static_cast<int>(std::lround(v));
    const double off = std::hypot(u - i, v - j);
    if (off > 0.35) continue;
    auto [it, fresh] = best.try_emplace({i, j}, off, k);
    if (!fresh && off < it->second.first) it->second = {off, k};
  }
  for (const auto& [ij, ok] : best) {
    Spot& s = spots[ok.second];
    s.i = ij.first;
    s.j = ij.second;
    s.assigned = true;
  }
}

}  // namespace

std::variant<Registration, std::string> register_lattice(std::span<const float> img, int w, int h,
                                                         const RegistrationSettings& settings) {
  if (auto e = validate(settings); !e.empty()) return e;
  if (w < 8 || h < 8 || img.size() != static_cast<std::size_t>(w) * h)
    return fmt::format("the image must be at least 8 x 8 px with width x height pixels, got {} x {} and {}", w, h,
                       img.size());
  for (float v : img)
    if (!std::isfinite(v)) return std::string("the image contains a NaN or infinite pixel");

  // (1) Spots.
  const double bg = median_of(std::vector<double>(img.begin(), img.end()));
  std::vector<double> dev;
  dev.reserve(img.size());
  for (float v : img) dev.push_back(std::abs(v - bg));
  const double noise = std::max(1.4826 * median_of(std::move(dev)), 1e-6 * std::max(1.0, std::abs(bg)));
  const double threshold = bg + settings.detect_snr * noise;
  struct Peak {
    float v;
    int x, y;
  };
  std::vector<Peak> peaks;
  const auto at = [&](int x, int y) { return img[static_cast<std::size_t>(y) * w + x]; };
  for (int y = 1; y < h - 1; ++y)
    for (int x = 1; x < w - 1; ++x) {
      const float v = at(x, y);
      if (v <= threshold) continue;
      // Ties go to the first pixel in reading order.
      if (!(v > at(x - 1, y - 1) && v > at(x, y - 1) && v > at(x + 1, y - 1) && v > at(x - 1, y) &&
            v >= at(x + 1, y) && v >= at(x - 1, y + 1) && v >= at(x, y + 1) && v >= at(x + 1, y + 1)))
        continue;
      // A lone hot pixel holds nearly all of its 3 x 3 light; a spot of
      // rms width >= 0.5 px puts at most ~half of it in its peak pixel.
      double around = 0.0;
      for (int yy = y - 1; yy <= y + 1; ++yy)
        for (int xx = x - 1; xx <= x + 1; ++xx) around += at(xx, yy) - bg;
      if ((v - bg) > 0.8 * around) continue;
      peaks.push_back({v, x, y});
    }
  if (peaks.size() < 9) return fmt::format("found {} spots above the background; registration needs at least 3 x 3",
                                           peaks.size());
  std::vector<double> heights;
  for (const Peak& p : peaks) heights.push_back(p.v - bg);
  const double median_height = median_of(heights);
  std::sort(peaks.begin(), peaks.end(), [](const Peak& a, const Peak& b) { return a.v > b.v; });
  std::vector<std::uint8_t> taken(static_cast<std::size_t>(w) * h, 0);
  std::vector<Spot> spots;
  for (const Peak& p : peaks) {
    if (p.v - bg < settings.min_peak_fraction * median_height) continue;
    bool near = false;
    for (int yy = std::max(0, p.y - 3); yy <= std::min(h - 1, p.y + 3) && !near; ++yy)
      for (int xx = std::max(0, p.x - 3); xx <= std::min(w - 1, p.x + 3); ++xx)
        if (taken[static_cast<std::size_t>(yy) * w + xx]) {
          near = true;
          break;
        }
    if (near) continue;
    taken[static_cast<std::size_t>(p.y) * w + p.x] = 1;
    Spot s;
    if (window_cog(img, w, h, p.x, p.y, 2, bg, s.x, s.y)) spots.push_back(s);
  }
  const int found = static_cast<int>(spots.size());
  if (found < 9) return fmt::format("found {} spots; registration needs at least 3 x 3", found);

  // (2) First guess from nearest neighbours.
  std::vector<double> nn_len, nn_ang;
  for (std::size_t a = 0; a < spots.size(); ++a) {
    double best = 1e300, bx = 0.0, by = 0.0;
    for (std::size_t b = 0; b < spots.size(); ++b) {
      if (a == b) continue;
      const double dx = spots[b].x - spots[a].x, dy = spots[b].y - spots[a].y, d2 = dx * dx + dy * dy;
      if (d2 < best) best = d2, bx = dx, by = dy;
    }
    nn_len.push_back(std::sqrt(best));
    const double q = std::numbers::pi / 2.0, phi = std::atan2(by, bx);
    nn_ang.push_back(phi - q * std::round(phi / q));
  }
  const double pitch0 = median_of(nn_len), angle0 = median_of(nn_ang);
  if (!(pitch0 >= 2.0)) return fmt::format("the spots are {:.2f} px apart; registration needs at least 2 px", pitch0);

  // (3) Indices, growing outward from the spot nearest the middle.
  double mx = 0.0, my = 0.0;
  for (const Spot& s : spots) mx += s.x, my += s.y;
  mx /= found;
  my /= found;
  const auto middle = std::min_element(spots.begin(), spots.end(), [&](const Spot& a, const Spot& b) {
    return std::hypot(a.x - mx, a.y - my) < std::hypot(b.x - mx, b.y - my);
  });
  Lattice lat{middle->x, middle->y, pitch0 * std::cos(angle0), pitch0 * std::sin(angle0)};
  const double extent = std::hypot(w, h) / pitch0 + 2.0;
  for (double radius = 4.0;; radius *= 2.0) {
    assign(spots, lat, radius);
    if (!fit_lattice(spots, lat)) return std::string("the spots do not form a lattice");
    if (radius > extent) break;
  }

  // (4) Refinement: re-centre each spot on a pitch-sized window, then fit
  // with outlier rejection.
  const int half = std::max(1, (static_cast<int>(std::floor(std::hypot(lat.c, lat.d))) - 1) / 2);
  for (Spot& s : spots)
    for (int pass = 0; pass < 2; ++pass) {
      double x = s.x, y = s.y;
      if (window_cog(img, w, h, static_cast<int>(std::lround(s.x)), static_cast<int>(std::lround(s.y)), half, bg, x,
                     y))
        s.x = x, s.y = y;
    }
  assign(spots, lat, extent);
  if (!fit_lattice(spots, lat)) return std::string("the spots do not form a lattice");
  std::vector<std::pair<int, int>> lit;  // every lattice cell that holds a spot, outliers included
  for (const Spot& s : spots)
    if (s.assigned) lit.emplace_back(s.i, s.j);
  for (int round = 0; round < 10; ++round) {
    std::vector<double> r;
    for (const Spot& s : spots)
      if (s.assigned) r.push_back(std::hypot(s.x - lat.x(s.i, s.j), s.y - lat.y(s.i, s.j)));
    const double limit = std::max(4.0 * 1.4826 * median_of(r), 0.1);
    int rejected = 0;
    for (Spot& s : spots)
      if (s.assigned && std::hypot(s.x - lat.x(s.i, s.j), s.y - lat.y(s.i, s.j)) > limit) {
        s.assigned = false;
        ++rejected;
      }
    if (!fit_lattice(spots, lat)) return std::string("the spots do not form a lattice");
    if (rejected == 0) break;
  }

  // The layout.
  int i_min = 1 << 30, i_max = -(1 << 30), j_min = 1 << 30, j_max = -(1 << 30), used = 0;
  double sum_r2 = 0.0;
  for (const Spot& s : spots) {
    if (!s.assigned) continue;
    i_min = std::min(i_min, s.i), i_max = std::max(i_max, s.i);
    j_min = std::min(j_min, s.j), j_max = std::max(j_max, s.j);
    const double dx = s.x - lat.x(s.i, s.j), dy = s.y - lat.y(s.i, s.j);
    sum_r2 += dx * dx + dy * dy;
    ++used;
  }
  const int nx = i_max - i_min + 1, ny = j_max - j_min + 1;
  if (used < 9 || nx < 3 || ny < 3)
    return fmt::format("the fit kept {} spots spanning {} x {} lenslets; registration needs at least 3 x 3", used,
                       nx, ny);
  const double pitch = std::hypot(lat.c, lat.d);
  const int box = settings.box_px > 0 ? settings.box_px : static_cast<int>(std::floor(pitch));
  if (box > w || box > h) return fmt::format("a {} px box does not fit the {} x {} frame", box, w, h);

  Registration out;
  out.fit.pitch_px = pitch;
  out.fit.rotation_deg = std::atan2(lat.d, lat.c) * 180.0 / std::numbers::pi;
  out.fit.origin_x_px = lat.x(i_min, j_min);
  out.fit.origin_y_px = lat.y(i_min, j_min);
  out.fit.residual_rms_px = std::sqrt(sum_r2 / used);
  out.fit.spots_found = found;
  out.fit.spots_used = used;
  out.grid = LensletGrid{nx, ny, box, 0, 0};
  out.layout.resize(static_cast<std::size_t>(nx) * ny);
  out.valid_map.assign(out.layout.size(), 0);
  for (auto [i, j] : lit)
    if (i >= i_min && i <= i_max && j >= j_min && j <= j_max)
      out.valid_map[static_cast<std::size_t>(j - j_min) * nx + (i - i_min)] = 1;
  for (int iy = 0; iy < ny; ++iy)
    for (int ix = 0; ix < nx; ++ix) {
      const std::size_t k = static_cast<std::size_t>(iy) * nx + ix;
      const double lx = lat.x(i_min + ix, j_min + iy), ly = lat.y(i_min + ix, j_min + iy);
      const long x0 = std::lround(lx - 0.5 * (box - 1)), y0 = std::lround(ly - 0.5 * (box - 1));
      const long cx0 = std::clamp<long>(x0, 0, w - box), cy0 = std::clamp<long>(y0, 0, h - box);
      if (cx0 != x0 || cy0 != y0) out.valid_map[k] = 0;
      out.layout[k] = {static_cast<int>(cx0), static_cast<int>(cy0), box, box, lx, ly};
    }
  return out;
}

}  // namespace slopecast::core

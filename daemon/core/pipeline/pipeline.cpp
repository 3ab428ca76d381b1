#include "daemon/core/pipeline/pipeline.h"

#include "daemon/core/centroid/centroid_noise.h"

#include <algorithm>
#include <cassert>
#include <cmath>
#include <cstring>
#include <limits>

#include <immintrin.h>

#include <fmt/format.h>

#include "daemon/core/frame/box_correction.h"
#include "daemon/core/frame/raw_columns.h"
#include "daemon/core/centroid/make_centroider.h"

namespace slopecast::core {

namespace {
// The largest box sum or pixel the pipeline publishes, ADU: far beyond any
// camera (2^32 x 1024^2 is 4.5e15), and 16 million such boxes still sum to a
// finite float.
constexpr double kMaxBoxAdu = 1e30;
}  // namespace

double full_scale_adu(PixelFormat format) {
  switch (format) {
    case PixelFormat::kU8: return 255.0;
    case PixelFormat::kU16: return 65535.0;
    case PixelFormat::kU32: return 4294967295.0;
    case PixelFormat::kF32: return std::numeric_limits<double>::infinity();
  }
  return std::numeric_limits<double>::infinity();
}

std::string validate(const PipelineSettings& s) {
  if (auto e = validate(s.camera); !e.empty()) return e;
  if (s.layout.empty()) {
    if (auto e = validate(s.grid, s.camera); !e.empty()) return e;
  } else {
    if (s.grid.n_subap_x < 1 || s.grid.n_subap_y < 1 || s.grid.pitch_px < 2)
      return fmt::format("the grid shape must be at least 1 x 1 subapertures of 2 px, got {} x {} of {} px",
                         s.grid.n_subap_x, s.grid.n_subap_y, s.grid.pitch_px);
    if (auto e = validate_layout(s.layout, s.grid, s.camera); !e.empty()) return e;
  }
  const auto n = static_cast<std::size_t>(s.grid.count());
  if (s.reference_slope_x_px.size() != s.reference_slope_y_px.size() ||
      (!s.reference_slope_x_px.empty() && s.reference_slope_x_px.size() != n))
    return fmt::format("reference slopes must be one x and one y per subaperture ({}), got {} x and {} y", n,
                       s.reference_slope_x_px.size(), s.reference_slope_y_px.size());
  for (std::size_t i = 0; i < s.reference_slope_x_px.size(); ++i)
    if (!std::isfinite(s.reference_slope_x_px[i]) || !std::isfinite(s.reference_slope_y_px[i]))
      return fmt::format("reference slope of subaperture {} is not finite", i);
  if (!s.valid_map.empty() && s.valid_map.size() != n)
    return fmt::format("the valid map has {} entries, the grid {} subapertures", s.valid_map.size(), n);
  const std::size_t pixels = static_cast<std::size_t>(s.camera.width_px) * s.camera.height_px;
  if (!s.dark_adu.empty() && s.dark_adu.size() != pixels)
    return fmt::format("dark frame has {} pixels, the camera has {} ({} x {})", s.dark_adu.size(),
                       pixels, s.camera.width_px, s.camera.height_px);
  for (float v : s.dark_adu)
    if (!std::isfinite(v)) return "dark frame contains a NaN or infinite pixel";
  if (!s.sky_adu.empty() && s.sky_adu.size() != pixels)
    return fmt::format("sky frame has {} pixels, the camera has {} ({} x {})", s.sky_adu.size(), pixels,
                       s.camera.width_px, s.camera.height_px);
  for (float v : s.sky_adu)
    if (!std::isfinite(v)) return "sky frame contains a NaN or infinite pixel";
  if (!s.flat.empty() && s.flat.size() != pixels)
    return fmt::format("flat field has {} pixels, the camera has {} ({} x {})", s.flat.size(), pixels,
                       s.camera.width_px, s.camera.height_px);
  for (float v : s.flat)
    if (!(v > 0.0f) || !std::isfinite(v)) return "flat field holds a pixel that is not a finite number > 0";
  if (!s.bad_pixels.empty() && s.bad_pixels.size() != pixels)
    return fmt::format("bad-pixel map has {} pixels, the camera has {} ({} x {})", s.bad_pixels.size(), pixels,
                       s.camera.width_px, s.camera.height_px);
  if (!std::isfinite(s.min_flux_adu) || s.min_flux_adu < 0.0)
    return fmt::format("min_flux_adu must be a finite number >= 0, got {}", s.min_flux_adu);
  if (!std::isfinite(s.min_snr) || s.min_snr < 0.0)
    return fmt::format("min_snr must be a finite number >= 0, got {}", s.min_snr);
  if (!(s.min_valid_fraction >= 0.0 && s.min_valid_fraction <= 1.0))
    return fmt::format("min_valid_fraction must be 0..1, got {}", s.min_valid_fraction);
  for (auto [name, v] : {std::pair{"edge_margin_px", s.edge_margin_px}, std::pair{"min_contrast", s.min_contrast},
                         std::pair{"max_fwhm_px", s.max_fwhm_px}, std::pair{"min_fwhm_px", s.min_fwhm_px},
                         std::pair{"max_ellipticity", s.max_ellipticity}})
    if (!std::isfinite(v) || v < 0.0) return fmt::format("{} must be a finite number >= 0, got {}", name, v);
  if (s.min_contrast > 1.0) return fmt::format("min_contrast is a contrast 0..1, got {}", s.min_contrast);
  if (s.max_ellipticity > 1.0) return fmt::format("max_ellipticity is 0..1, got {}", s.max_ellipticity);
  if (auto e = validate(s.centroider, s.grid.pitch_px); !e.empty()) return "centroider: " + e;
  if (s.saturation_adu && !(*s.saturation_adu > 0.0))
    return fmt::format("saturation_adu must be > 0, got {}", *s.saturation_adu);
  if (subtracts_border(s.background) && s.grid.pitch_px < kMinPitchForBorderBackground)
    return fmt::format(
        "background = \"border\" needs pitch_px >= {} so that the spot has room inside the "
        "border ring; pitch_px is {} (use background = \"none\" with a dark frame)",
        kMinPitchForBorderBackground, s.grid.pitch_px);
  return {};
}

Pipeline::Lane::Lane(const PipelineSettings& s, int max_run, bool strip, bool raw_columns)
    : centroider(make_centroider(s.centroider, s.grid.pitch_px)),
      strip(strip ? static_cast<std::size_t>(s.grid.pitch_px) * max_run * s.grid.pitch_px : 0),
      column_max(static_cast<std::size_t>(max_run) * s.grid.pitch_px),
      rings(static_cast<std::size_t>(max_run) * border_scratch_size(s.grid.pitch_px, s.grid.pitch_px)),
      ring_soa(static_cast<std::size_t>(border_batch_scratch_size(border_pixel_count(s.grid.pitch_px, s.grid.pitch_px)))),
      moments(max_run * s.grid.pitch_px),
      strip_moments(static_cast<std::size_t>(max_run)),
      raw_box(static_cast<std::size_t>(s.grid.pitch_px) * s.grid.pitch_px),
      levels(static_cast<std::size_t>(max_run)),
      run_moments(static_cast<std::size_t>(max_run)) {
  if (raw_columns)
    for (auto* v : {&col_s, &col_sy, &col_syy, &col_max})
      v->assign(static_cast<std::size_t>(max_run) * s.grid.pitch_px + kRawColumnSlack, 0u);
}

Pipeline::Pipeline(PipelineSettings settings, int lanes, std::optional<SimdLevel> simd)
    : settings_(std::move(settings)),
      boxes_(settings_.layout.empty() ? regular_layout(settings_.grid) : settings_.layout),
      runs_(box_runs(boxes_)),
      folded_(raw_columns_exact(settings_.camera.format, settings_.grid.pitch_px) && settings_.flat.empty()),
      needs_pixels_(settings_.centroider.kind != CentroiderKind::kCog || !folded_),
      simd_(simd.value_or(best_simd_level())),
      kernel_(folded_ ? raw_column_kernel(settings_.camera.format, simd_) : nullptr),
      sums_fit_32_(folded_ && box_sums_fit_32(settings_.grid.pitch_px, settings_.grid.pitch_px,
                                              static_cast<std::uint32_t>(full_scale_adu(settings_.camera.format)))),
      borders_(static_cast<std::size_t>(settings_.grid.count())),
      estimates_(static_cast<std::size_t>(settings_.grid.count())),
      contexts_(static_cast<std::size_t>(settings_.grid.count())),
      raw_max_(static_cast<std::size_t>(settings_.grid.count())),
      saturated_pixels_(static_cast<std::size_t>(settings_.grid.count())),
      sigmas_(static_cast<std::size_t>(settings_.grid.count())),
      fwhms_(static_cast<std::size_t>(settings_.grid.count())),
      snrs_(static_cast<std::size_t>(settings_.grid.count())),
      shapes_(static_cast<std::size_t>(settings_.grid.count())),
      saturation_adu_(static_cast<float>(settings_.saturation_adu.value_or(full_scale_adu(settings_.camera.format)))) {
  assert(validate(settings_).empty());
  assert(lanes >= 1);
  int max_run = 1;
  for (const BoxRun& r : runs_) max_run = std::max(max_run, r.count);
  for (int i = 0; i < lanes; ++i) lanes_.emplace_back(settings_, max_run, needs_pixels_, folded_);
  const std::size_t n = boxes_.size();
  offset_x_.resize(n);
  offset_y_.resize(n);
  for (std::size_t i = 0; i < n; ++i) {
    const SubapertureBox& b = boxes_[i];
    const bool rs = !settings_.reference_slope_x_px.empty();
    offset_x_[i] = b.x0 - b.ref_x - (rs ? settings_.reference_slope_x_px[i] : 0.0);
    offset_y_[i] = b.y0 - b.ref_y - (rs ? settings_.reference_slope_y_px[i] : 0.0);
  }
  offset_ = settings_.dark_adu.empty() ? settings_.sky_adu : settings_.dark_adu;
  if (!settings_.dark_adu.empty() && !settings_.sky_adu.empty())
    for (std::size_t k = 0; k < offset_.size(); ++k) offset_[k] += settings_.sky_adu[k];
  if (!settings_.flat.empty() || !settings_.bad_pixels.empty()) {
    const std::size_t pixels = static_cast<std::size_t>(settings_.camera.width_px) * settings_.camera.height_px;
    gain_.assign(pixels, 1.0f);
    for (std::size_t k = 0; k < pixels; ++k) {
      if (!settings_.flat.empty()) gain_[k] = 1.0f / settings_.flat[k];
      if (!settings_.bad_pixels.empty() && settings_.bad_pixels[k]) gain_[k] = 0.0f;
    }
  }
  // Each box's bad pixels, with their good neighbours in the run's strip.
  box_fixes_.assign(boxes_.size() + 1, 0);
  std::size_t most_in_a_box = 0;
  for (std::size_t r = 0; r < runs_.size(); ++r) {
    const int p = settings_.grid.pitch_px, first = runs_[r].first;
    const int x0 = boxes_[first].x0, y0 = boxes_[first].y0, sw = runs_[r].count * p, W = settings_.camera.width_px;
    const auto bad = [&](int x, int y) {
      return !settings_.bad_pixels.empty() && settings_.bad_pixels[static_cast<std::size_t>(y0 + y) * W + x0 + x] != 0;
    };
    for (int ix = 0; ix < runs_[r].count; ++ix) {
      const std::size_t before = bad_fixes_.size();
      box_fixes_[first + ix] = static_cast<int>(before);
      for (int y = 0; y < p; ++y)
        for (int x = ix * p; x < (ix + 1) * p; ++x) {
          if (!bad(x, y)) continue;
          BadFix f;
          f.at = y * sw + x;
          f.lx = x - ix * p;
          f.ly = y;
          f.fx = x0 + x;
          f.fy = y0 + y;
          for (int dy = -1; dy <= 1; ++dy)
            for (int dx = -1; dx <= 1; ++dx) {
              const int nx = x + dx, ny = y + dy;
              if (!(dx || dy) || nx < 0 || ny < 0 || nx >= sw || ny >= p || bad(nx, ny)) continue;
              f.from[f.n] = ny * sw + nx;
              f.from_x[f.n] = x0 + nx;
              f.from_y[f.n] = y0 + ny;
              ++f.n;
            }
          bad_fixes_.push_back(f);
        }
      most_in_a_box = std::max(most_in_a_box, bad_fixes_.size() - before);
    }
  }
  box_fixes_[boxes_.size()] = static_cast<int>(bad_fixes_.size());
  for (Lane& l : lanes_) l.patches.resize(most_in_a_box);
  ring_pixels_ = border_pixel_count(settings_.grid.pitch_px, settings_.grid.pitch_px);
  ring_stride_ = border_scratch_size(settings_.grid.pitch_px, settings_.grid.pitch_px);
  if (folded_) {
    const int p = settings_.grid.pitch_px;
    if (!offset_.empty()) {
      ring_dark_.resize(n * ring_pixels_);
      for (std::size_t i = 0; i < n; ++i)
        ring_dark_values(offset_, settings_.camera.width_px, Box{boxes_[i].x0, boxes_[i].y0, p, p},
                         ring_dark_.data() + i * ring_pixels_);
    }
    folded_dark_.resize(n);
    for (std::size_t i = 0; i < n; ++i)
      folded_dark_[i] = fold_dark(offset_, settings_.camera.width_px, boxes_[i].x0, boxes_[i].y0, p, p);
  }
}

FrameMeasurement Pipeline::make_measurement() const {
  FrameMeasurement m;
  m.resize(settings_.grid.count());
  return m;
}

void Pipeline::measure(const ImageView& image, FrameMeasurement& out) {
  measure_runs(image, 0, run_count(), 0);
  finish(out);
}

void Pipeline::measure_runs(const ImageView& image, int run_begin, int run_end, int lane_index) {
  const PipelineSettings& s = settings_;
  Lane& lane = lanes_[static_cast<std::size_t>(lane_index)];
  const int p = s.grid.pitch_px;
  const bool subtract = subtracts_border(s.background);
  const bool check_saturation = std::isfinite(saturation_adu_);
  const RawColumns cols{lane.col_s.data(), lane.col_sy.data(), lane.col_syy.data(), lane.col_max.data()};

  for (int r = run_begin; r < run_end; ++r) {
    const int row0 = runs_[r].first, n_boxes = runs_[r].count;
    const int strip_width = n_boxes * p;
    const StripView strip{lane.strip.data(), p, p, n_boxes, strip_width};
    const Box strip_box{boxes_[row0].x0, boxes_[row0].y0, strip_width, p};
    // Pixels: integer column sums (folded path), and the corrected strip
    // where the method reads pixels or the frame cannot be folded.
    if (folded_) kernel_(image, strip_box.x0, strip_box.y0, strip_width, p, cols);
    if (needs_pixels_) {
      correct_box(image, offset_, strip_box, lane.strip,
                  folded_ ? std::span<float>() : std::span<float>(lane.column_max), gain_);
      for (int k = box_fixes_[row0]; k < box_fixes_[row0 + n_boxes]; ++k) {
        const BadFix& f = bad_fixes_[k];
        float sum = 0.0f;
        for (int j = 0; j < f.n; ++j) sum += lane.strip[f.from[j]];
        lane.strip[f.at] = f.n ? sum / f.n : 0.0f;
      }
    }
    // The boxes' border rings, then their statistics, eight boxes at a time.
    for (int ix = 0; ix < n_boxes; ++ix) {
      const int i = row0 + ix;
      float* ring = lane.rings.data() + static_cast<std::size_t>(ix) * ring_stride_;
      if (needs_pixels_)
        gather_border(strip.window(ix), ring);
      else
        gather_border_raw(image,
                          ring_dark_.empty() ? std::span<const float>()
                                             : std::span<const float>(ring_dark_).subspan(
                                                   static_cast<std::size_t>(i) * ring_pixels_, ring_pixels_),
                          Box{boxes_[i].x0, boxes_[i].y0, p, p}, ring);
    }
    border_stats_batch(lane.rings.data(), ring_stride_, n_boxes, ring_pixels_, s.background,
                       std::span<BorderStats>(borders_).subspan(row0, n_boxes), lane.ring_soa, simd_);
    for (int ix = 0; ix < n_boxes; ++ix) {
      const BorderStats& b = borders_[row0 + ix];
      lane.levels[ix] = subtract && b.finite ? b.level_adu : 0.0f;
    }
    // Folded path: every box's moments from the column sums, four boxes at
    // a time; a box with bad pixels again, alone, with its repairs.
    if (folded_)
      folded_moments_run(cols, n_boxes, p, p, folded_dark_.data() + row0, lane.levels.data(), sums_fit_32_, simd_,
                         lane.run_moments.data());
    for (int ix = 0; ix < n_boxes; ++ix) {
      const int i = row0 + ix;
      const Box box{boxes_[i].x0, boxes_[i].y0, p, p};
      const BorderStats& b = borders_[i];
      const float level = lane.levels[ix];
      if (needs_pixels_ && level != 0.0f) subtract_constant(lane.strip.data() + ix * p, p, p, strip_width, level);
      if (folded_) {
        const int nbad = box_fixes_[i + 1] - box_fixes_[i];
        if (nbad > 0) {
          repair_folded(image, i, lane);
          contexts_[i].moments = folded_moments(cols, ix * p, p, p, folded_dark_[i], level,
                                                std::span<const PixelPatch>(lane.patches.data(), nbad), sums_fit_32_);
        } else {
          contexts_[i].moments = lane.run_moments[ix];
        }
        raw_max_[i] = static_cast<float>(nbad > 0 ? good_raw_max(image, box) : contexts_[i].moments.peak);
        contexts_[i].moments.peak = raw_max_[i];
      } else {
        const float* cm = lane.column_max.data() + ix * p;
        raw_max_[i] = *std::max_element(cm, cm + p);
      }
      contexts_[i].noise_adu = b.sigma_adu;
      saturated_pixels_[i] = 0;
      // Rare: only a box that reached the level is read again, raw, to count
      // its saturated pixels.
      if (check_saturation && raw_max_[i] >= saturation_adu_) {
        correct_box(image, {}, box, lane.raw_box);
        std::uint32_t n = 0;
        for (int y = 0; y < p; ++y)
          for (int x = 0; x < p; ++x)
            n += lane.raw_box[static_cast<std::size_t>(y) * p + x] >= saturation_adu_ &&
                 !is_bad(box.x0 + x, box.y0 + y);
        saturated_pixels_[i] = n;
      }
    }
    if (!folded_) {
      lane.moments.strip(strip, lane.strip_moments);
      for (int ix = 0; ix < n_boxes; ++ix) {
        WindowMoments m = lane.strip_moments[ix];
        m.peak = raw_max_[row0 + ix];  // published peak: the raw maximum, as on the folded path
        contexts_[row0 + ix].moments = m;
      }
    }
    const auto ctx = std::span<const WindowContext>(contexts_).subspan(row0, n_boxes);
    const auto est = std::span<SpotEstimate>(estimates_).subspan(row0, n_boxes);
    if (needs_pixels_) {
      lane.centroider->measure_strip(strip, ctx, est);
    } else {
      const WindowView none{};
      for (int ix = 0; ix < n_boxes; ++ix) est[ix] = lane.centroider->measure(none, ctx[ix]);
    }
  }
}

bool Pipeline::is_bad(int x, int y) const {
  return !settings_.bad_pixels.empty() &&
         settings_.bad_pixels[static_cast<std::size_t>(y) * settings_.camera.width_px + x] != 0;
}

void Pipeline::repair_folded(const ImageView& image, int i, Lane& lane) const {
  const auto dark = [&](int x, int y) {
    return offset_.empty() ? 0.0 : offset_[static_cast<std::size_t>(y) * settings_.camera.width_px + x];
  };
  const auto corrected = [&](int x, int y) {
    return load_pixel_as_double(image.format, image.row(y), static_cast<std::size_t>(x)) - dark(x, y);
  };
  int k = 0;
  for (int b = box_fixes_[i]; b < box_fixes_[i + 1]; ++b, ++k) {
    const BadFix& f = bad_fixes_[b];
    double mean = 0.0;
    for (int j = 0; j < f.n; ++j) mean += corrected(f.from_x[j], f.from_y[j]);
    mean = f.n ? mean / f.n : 0.0;
    lane.patches[k] = {f.lx, f.ly, mean - corrected(f.fx, f.fy)};
  }
}

double Pipeline::good_raw_max(const ImageView& image, const Box& box) const {
  double best = 0.0;
  for (int y = box.y0; y < box.y0 + box.height; ++y)
    for (int x = box.x0; x < box.x0 + box.width; ++x)
      if (!is_bad(x, y)) best = std::max(best, load_pixel_as_double(image.format, image.row(y), static_cast<std::size_t>(x)));
  return best;
}

namespace {
// Four boxes per vector for flux_snr_of() and spot_shape_of() (their
// headers say why each lane is bit for bit the scalar result).
typedef double D4 __attribute__((vector_size(32)));

// Square roots, two lanes per SSE2 instruction (no AVX needed).
void sqrt4(const D4& v, D4& out) {
  __m128d half[2];
  std::memcpy(half, &v, sizeof half);
  half[0] = _mm_sqrt_pd(half[0]);
  half[1] = _mm_sqrt_pd(half[1]);
  std::memcpy(&out, half, sizeof half);
}

}  // namespace

void Pipeline::finish(FrameMeasurement& out) {
  assert(out.size() == static_cast<int>(boxes_.size()));
  decide(out);
}

void Pipeline::decide(FrameMeasurement& out) {
  const PipelineSettings& s = settings_;
  const int p = s.grid.pitch_px;
  const double edge_lo = -0.5, edge_hi = p - 0.5;  // box edges, window-local px
  const bool check_edge = s.edge_margin_px > 0.0 && p >= 2.0 * s.edge_margin_px + 2.0;
  const double near_lo = edge_lo + s.edge_margin_px, near_hi = edge_hi - s.edge_margin_px;
  const bool check_contrast = s.min_contrast > 0.0 && s.centroider.kind == CentroiderKind::kCorrelation;
  const int n_pixels = p * p;
  const bool subtract = subtracts_border(s.background);
  const bool check_saturation = std::isfinite(saturation_adu_);

  // A ring of ~56 pixels gives each box's noise to ~10 %; where it happens
  // to read low, an empty box's significance is inflated (measured on bias +
  // read noise + background light: 38 of 102 400 empty boxes above 4 and 7
  // above 5, against 3.2 and 0.03 for a Gaussian). The frame's median of the
  // boxes' noise is a floor under each box's own figure; a box on a locally
  // brighter background keeps its larger one.
  int n_sigmas = 0;
  for (const BorderStats& b : borders_)
    if (b.finite) sigmas_[n_sigmas++] = b.sigma_adu;
  float frame_sigma = 0.0f;
  if (n_sigmas > 0) {
    std::nth_element(sigmas_.begin(), sigmas_.begin() + n_sigmas / 2, sigmas_.begin() + n_sigmas);
    frame_sigma = sigmas_[n_sigmas / 2];
  }

  // Each box's significance and shape, four boxes at a time (used below
  // only where the box's figures are finite).
  const int n_all = static_cast<int>(boxes_.size());
  for (int first = 0; first < n_all; first += 4) {
    D4 flux, sigma, n_ring, var_x, var_y, cov_xy;
    for (int b = 0; b < 4; ++b) {
      const int i = std::min(first + b, n_all - 1);
      const WindowMoments& m = contexts_[i].moments;
      flux[b] = m.flux;
      sigma[b] = std::max(borders_[i].sigma_adu, frame_sigma);
      n_ring[b] = borders_[i].n_kept;
      var_x[b] = m.var_x;
      var_y[b] = m.var_y;
      cov_xy[b] = m.cov_xy;
    }
    D4 snr, fwhm_x, fwhm_y, ellipticity;
    flux_snr_of(flux, sigma, n_pixels, n_ring, subtract, sqrt4, snr);
    spot_shape_of(var_x, var_y, cov_xy, sqrt4, fwhm_x, fwhm_y, ellipticity);
    for (int b = 0; b < 4 && first + b < n_all; ++b) {
      snrs_[first + b] = snr[b];
      shapes_[first + b] = SpotShape{fwhm_x[b], fwhm_y[b], ellipticity[b]};
    }
  }

  double sum_x2 = 0.0, sum_y2 = 0.0, sum_flux = 0.0, total_flux = 0.0;
  int n_valid = 0, n_saturated = 0, n_lit = 0, n_in_map = 0;
  bool any_non_finite = false;
  const int n_boxes = static_cast<int>(boxes_.size());
  for (int i = 0; i < n_boxes; ++i) {
    const bool in_map = s.valid_map.empty() || s.valid_map[i] != 0;
    const SpotEstimate& e = estimates_[i];
    const WindowMoments& m = contexts_[i].moments;
    const BorderStats& b = borders_[i];
    // A non-finite pixel (possible in f32 frames) must not leak NaN onto
    // the wire: the flag says why, the numbers become 0. Sums beyond
    // kMaxBoxAdu count as non-finite too: no camera delivers them, and their
    // float image (or the frame's total) would be infinite.
    const bool finite = std::isfinite(m.flux) && std::isfinite(m.peak) && b.finite &&
                        std::abs(m.flux) <= kMaxBoxAdu && std::abs(m.peak) <= kMaxBoxAdu &&
                        std::abs(b.level_adu) <= kMaxBoxAdu && std::abs(b.sigma_adu) <= kMaxBoxAdu;
    const bool placed = e.located && std::isfinite(e.x) && std::isfinite(e.y);
    const double snr = finite ? snrs_[i] : 0.0;
    const SpotShape shape = finite && m.located ? shapes_[i] : SpotShape{};
    const bool own_width = std::isfinite(e.fwhm_x) && std::isfinite(e.fwhm_y);
    const double fwhm_x = own_width ? e.fwhm_x : shape.fwhm_x, fwhm_y = own_width ? e.fwhm_y : shape.fwhm_y;
    const float quality = std::isfinite(e.quality) ? e.quality : 0.0f;
    out.flux_adu[i] = finite ? static_cast<float>(m.flux) : 0.0f;
    out.peak_adu[i] = finite ? static_cast<float>(m.peak) : 0.0f;
    out.background_adu[i] = finite && subtract ? b.level_adu : 0.0f;
    out.snr[i] = static_cast<float>(std::min(snr, 1e9));
    out.fwhm_x_px[i] = static_cast<float>(std::min(fwhm_x, 1e9));
    out.fwhm_y_px[i] = static_cast<float>(std::min(fwhm_y, 1e9));
    out.ellipticity[i] = static_cast<float>(shape.ellipticity);
    out.quality[i] = finite ? quality : 0.0f;
    std::uint32_t flags = in_map ? kFlagNone : kFlagMasked;
    if (!finite || (m.flux > 0.0 && !placed)) flags |= kFlagNonFinite;
    if (finite && !(m.flux >= s.min_flux_adu && m.flux > 0.0)) flags |= kFlagLowFlux;
    if (finite && s.min_snr > 0.0 && snr < s.min_snr) flags |= kFlagLowSnr;
    if (placed) {
      if (e.x < edge_lo || e.x > edge_hi || e.y < edge_lo || e.y > edge_hi) flags |= kFlagOutsideBox;
      else if (check_edge && (e.x < near_lo || e.x > near_hi || e.y < near_lo || e.y > near_hi))
        flags |= kFlagNearEdge;
      if (e.failed) flags |= kFlagMethodFailed;
    }
    if (finite && check_contrast && quality < s.min_contrast) flags |= kFlagLowContrast;
    if (finite && s.max_fwhm_px > 0.0 && std::max(fwhm_x, fwhm_y) > s.max_fwhm_px) flags |= kFlagWide;
    if (finite && placed && s.min_fwhm_px > 0.0 && std::max(fwhm_x, fwhm_y) < s.min_fwhm_px) flags |= kFlagNarrow;
    if (finite && s.max_ellipticity > 0.0 && shape.ellipticity > s.max_ellipticity) flags |= kFlagElongated;
    if (finite && m.trough < -10.0 * std::max(b.sigma_adu, frame_sigma) && -m.trough > m.flux)
      flags |= kFlagNegativePixel;
    if (check_saturation && raw_max_[i] >= saturation_adu_) flags |= kFlagSaturated;
    out.saturated_pixels[i] = check_saturation ? saturated_pixels_[i] : 0;
    out.flags[i] = flags;
    // Frame figures count the subapertures in the valid map only: light
    // outside the pupil says nothing about the wavefront.
    if (in_map) {
      ++n_in_map;
      any_non_finite |= !finite;
      if (finite) total_flux += m.flux;
      if (flags & kFlagSaturated) ++n_saturated;
      if (!(flags & (kFlagLowFlux | kFlagLowSnr | kFlagNonFinite))) ++n_lit;
    }
    if (flags != kFlagNone) {
      out.slope_x_px[i] = 0.0f;
      out.slope_y_px[i] = 0.0f;
      out.slope_var_x_px2[i] = 0.0f;
      out.slope_var_y_px2[i] = 0.0f;
      continue;
    }
    const double sx = e.x + offset_x_[i], sy = e.y + offset_y_[i];
    out.slope_x_px[i] = static_cast<float>(sx);
    out.slope_y_px[i] = static_cast<float>(sy);
    if (s.gain_e_per_adu > 0.0) {
      SpotNoiseInputs in;
      in.photons_e = m.flux * s.gain_e_per_adu;
      in.background_e_per_px = subtract ? b.level_adu * s.gain_e_per_adu : 0.0;
      in.read_noise_e = s.read_noise_e;
      in.box_px = p;
      in.spot_sigma_px = fwhm_x / 2.3548;
      const double vx = centroid_noise_variance(s.centroider, in);
      in.spot_sigma_px = fwhm_y / 2.3548;
      const double vy = centroid_noise_variance(s.centroider, in);
      out.slope_var_x_px2[i] = std::isfinite(vx) ? static_cast<float>(vx) : 0.0f;
      out.slope_var_y_px2[i] = std::isfinite(vy) ? static_cast<float>(vy) : 0.0f;
    }
    sum_x2 += sx * sx;
    sum_y2 += sy * sy;
    sum_flux += m.flux;
    fwhms_[n_valid] = 0.5f * (out.fwhm_x_px[i] + out.fwhm_y_px[i]);
    ++n_valid;
  }
  out.n_valid = n_valid;
  out.n_saturated = n_saturated;
  out.slope_rms_x_px = n_valid ? static_cast<float>(std::sqrt(sum_x2 / n_valid)) : 0.0f;
  out.slope_rms_y_px = n_valid ? static_cast<float>(std::sqrt(sum_y2 / n_valid)) : 0.0f;
  out.mean_flux_adu = n_valid ? static_cast<float>(sum_flux / n_valid) : 0.0f;
  out.total_flux_adu = static_cast<float>(total_flux);
  out.median_fwhm_px = 0.0f;
  if (n_valid > 0) {
    std::nth_element(fwhms_.begin(), fwhms_.begin() + n_valid / 2, fwhms_.begin() + n_valid);
    out.median_fwhm_px = fwhms_[n_valid / 2];
  }
  std::uint32_t health = kHealthOk;
  if (n_saturated > 0) health |= kHealthSaturated;
  if (n_lit == 0) health |= kHealthNoLight;
  if (n_valid < s.min_valid_fraction * n_in_map) health |= kHealthFewValid;
  if (any_non_finite) health |= kHealthNonFinite;
  out.health = health;
}

std::variant<std::vector<float>, std::string> Pipeline::capture_reference(const ImageView& image,
                                                                          const FrameMeasurement& measured) const {
  const int p = settings_.grid.pitch_px;
  std::vector<float> box(static_cast<std::size_t>(p) * p), ring(static_cast<std::size_t>(border_scratch_size(p, p)));
  std::vector<double> sum(box.size(), 0.0);
  std::vector<int> count(box.size(), 0);
  int used = 0;
  for (std::size_t i = 0; i < boxes_.size(); ++i) {
      if (measured.flags[i] != kFlagNone) continue;
      correct_box(image, offset_, Box{boxes_[i].x0, boxes_[i].y0, p, p}, box, {}, gain_);
      const WindowView w{box.data(), p, p, p};
      const BorderStats b = border_stats(w, ring, settings_.background);
      const float level = subtracts_border(settings_.background) && b.finite ? b.level_adu : 0.0f;
      // The spot's offset from the box centre (its slope is measured from the
      // reference point, which need not be the centre).
      const double centre = 0.5 * (p - 1);
      const int dx = static_cast<int>(std::lround(measured.slope_x_px[i] - offset_x_[i] - centre));
      const int dy = static_cast<int>(std::lround(measured.slope_y_px[i] - offset_y_[i] - centre));
      for (int y = 0; y < p; ++y)
        for (int x = 0; x < p; ++x) {
          const int sx = x + dx, sy = y + dy;  // the pixel that lands on (x, y)
          if (sx < 0 || sy < 0 || sx >= p || sy >= p) continue;
          sum[static_cast<std::size_t>(y) * p + x] += box[static_cast<std::size_t>(sy) * p + sx] - level;
          ++count[static_cast<std::size_t>(y) * p + x];
        }
      ++used;
    }
  if (used == 0) return std::string("no subaperture of the frame is valid, so there is no spot to take as the reference");
  double total = 0.0;
  for (std::size_t k = 0; k < sum.size(); ++k) {
    if (count[k] > 0) sum[k] /= count[k];
    total += sum[k];
  }
  if (!(total > 0.0)) return std::string("the mean of the valid spots has no positive light");
  std::vector<float> ref(sum.size());
  for (std::size_t k = 0; k < sum.size(); ++k) ref[k] = static_cast<float>(sum[k] / total);
  return ref;
}

}  // namespace slopecast::core

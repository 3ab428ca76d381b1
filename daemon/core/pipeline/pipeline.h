// One frame in, one FrameMeasurement out: the pure heart of the daemon.
//
//   pass 1, pixels -- for each row of subapertures: correct the strip of
//   boxes (raw - dark, noting each column's raw maximum) -> per box: border
//   statistics and background subtraction (background.h) -> one sweep for
//   every box's flux, peak and moments (window_moments.h) -> the centroider,
//   given those facts;
//   pass 2, decisions -- the frame's median pixel noise; per box: flux
//   significance, spot widths and shape, validity flags, slope = position -
//   zero point; then frame statistics and the frame health word.
//
// Validity (frame_measurement.h): a subaperture is valid only when no flag
// is set; every reason that applies is flagged, not just the first.
//
// Working a strip at a time reads each pixel of the grid once, keeps the
// corrected strip (pitch x grid width floats) in L1 cache, and gives the
// inner loops full grid-width rows to vectorise over.
//
// Call order: construct with settings that passed validate() (the
// constructor allocates every buffer), then call measure() once per frame;
// measure() does not allocate, lock, log or touch a clock. A Pipeline is not
// shared between threads; the daemon swaps whole pipelines between frames.
#pragma once

#include <memory>
#include <optional>
#include <string>
#include <variant>
#include <vector>

#include "daemon/core/metrics/background.h"
#include "daemon/core/centroid/centroider.h"
#include "daemon/core/frame/raw_columns.h"
#include "daemon/core/metrics/window_moments.h"
#include "daemon/core/pipeline/frame_measurement.h"
#include "daemon/core/frame/image_view.h"
#include "daemon/core/geometry/sensor_geometry.h"
#include "daemon/core/geometry/subaperture_layout.h"

namespace slopecast::core {

struct PipelineSettings {
  CameraSpec camera;
  // The grid's shape and box side; its origin places the boxes only when
  // `layout` is empty.
  LensletGrid grid;
  // Per-subaperture boxes and reference points (subaperture_layout.h), in
  // index order; empty: regular_layout(grid), box centres as zero points.
  std::vector<SubapertureBox> layout;
  // Reference slopes, px, per subaperture: subtracted from every published
  // slope (the mean slopes of the reference source, taken by calibration).
  // Both empty, or both one per subaperture.
  std::vector<float> reference_slope_x_px;
  std::vector<float> reference_slope_y_px;
  // Valid map, one per subaperture: 0 excludes the subaperture for good
  // (outside the pupil, vignetted), flagged kFlagMasked; empty: all in.
  std::vector<std::uint8_t> valid_map;
  // Dark frame, ADU, row-major camera.width_px * camera.height_px values; empty
  // for none. Subtracted from every frame before centroiding.
  std::vector<float> dark_adu;
  // Sky frame, ADU, row-major camera-sized; empty for none: the light that
  // reaches the detector with the source off (sky, stray light), dark
  // removed. Subtracted like the dark, per pixel, before everything else
  // (the pipeline folds dark + sky into one offset).
  std::vector<float> sky_adu;
  // Flat field, row-major camera-sized, mean 1 over the pupil
  // (calibration/flat_field.h); empty for none. The pipeline measures
  // (raw - dark) / flat. A flat sends u8/u16 frames down the float path:
  // the division is per pixel and cannot be folded into per-box constants.
  std::vector<float> flat;
  // Bad-pixel map, row-major camera-sized, non-zero = bad
  // (calibration/bad_pixels.h); empty for none. A bad pixel is replaced by
  // the mean of its good neighbours (of the 8, those inside the same run of
  // boxes), corrected, and never counts as the box's peak or as saturated.
  // On the float path the replacement is written into the strip before
  // anything reads it; on the folded path it is added to the box's sums
  // (PixelPatch), so a few bad pixels cost a few reads, not the fast path.
  // One difference: the folded path's border ring still reads a bad pixel
  // on the ring as it is (the ring's median shrugs off one outlier).
  std::vector<std::uint8_t> bad_pixels;
  // Per-box background estimate, subtracted after the dark (background.h).
  BackgroundMode background = BackgroundMode::kBorder;
  // A subaperture whose background-subtracted flux is below this is invalid, ADU.
  double min_flux_adu = 0.0;
  // A subaperture whose flux significance (background.h) is below this is
  // invalid; 0 turns the check off.
  double min_snr = 5.0;
  // A raw pixel (before the dark) at or above this saturates its
  // subaperture, ADU. nullopt: the pixel type's full scale (255, 65535,
  // 4294967295; no check for f32).
  std::optional<double> saturation_adu;
  // Fewer valid subapertures than this fraction of the grid sets
  // kHealthFewValid on the frame; 0 turns the check off.
  double min_valid_fraction = 0.5;
  // A centroid closer than this to the box edge is flagged kFlagNearEdge:
  // part of the spot's light falls outside the box and pulls it inward.
  // 0 turns the check off; it is skipped for boxes narrower than
  // 2 * edge_margin_px + 2 px (a quad-cell's 2 x 2 box), which would
  // always be "near".
  double edge_margin_px = 1.0;
  // Correlation peak contrast (CorrelationCentroider) below this is flagged
  // kFlagLowContrast; 0 turns the check off.
  double min_contrast = 0.0;
  // A spot wider than this (FWHM, larger axis) is flagged kFlagWide; 0: off.
  double max_fwhm_px = 0.0;
  // A spot narrower than this (FWHM, larger axis) is flagged kFlagNarrow: a
  // lone hot pixel has FWHM 0 after the pixel's own 1/12 px^2 is removed.
  // 0: off (undersampled sensors have sub-pixel spots).
  double min_fwhm_px = 0.0;
  // A spot more elongated than this (1 - minor/major) is flagged
  // kFlagElongated; 0: off.
  double max_ellipticity = 0.0;
  CentroiderSettings centroider;
  // The camera's noise, for each slope's model variance (centroid_noise.h):
  // read noise, e- rms per pixel, and gain, e- per ADU. gain 0: no model
  // (the variances are published as 0).
  double read_noise_e = 0.0;
  double gain_e_per_adu = 0.0;
};

// The raw level at which a pixel of this format counts as saturated by
// default (its full scale); infinity for f32.
double full_scale_adu(PixelFormat format);

// Empty when settings can build a Pipeline; otherwise what is wrong.
std::string validate(const PipelineSettings& settings);

class Pipeline {
 public:
  // Precondition: validate(settings) is empty. lanes: how many threads may
  // call measure_runs() at once (each lane has its own scratch). simd: the
  // kernels' instruction set (default: the best this CPU runs; tests force
  // each).
  explicit Pipeline(PipelineSettings settings, int lanes = 1, std::optional<SimdLevel> simd = std::nullopt);

  const PipelineSettings& settings() const { return settings_; }
  // Returns a FrameMeasurement sized for this pipeline's grid.
  FrameMeasurement make_measurement() const;

  // Precondition: image matches settings().camera (check_frame() passed) and
  // out came from make_measurement().
  void measure(const ImageView& image, FrameMeasurement& out);

  // measure() in parts, for several threads: pass 1 over the box runs
  // [run_begin, run_end) (subaperture_layout.h; a regular grid's runs are
  // its rows) with lane `lane`'s scratch (distinct lanes may run at once on
  // disjoint runs; they share no writable memory), then finish() once every
  // run is done. measure() is measure_runs(all runs, lane 0) + finish().
  void measure_runs(const ImageView& image, int run_begin, int run_end, int lane);
  void finish(FrameMeasurement& out);
  int lanes() const { return static_cast<int>(lanes_.size()); }
  int run_count() const { return static_cast<int>(runs_.size()); }
  // The boxes in force (settings().layout, or the grid's regular layout).
  const std::vector<SubapertureBox>& boxes() const { return boxes_; }
  // Whether u8/u16 pixels go through the integer column sums (the folded
  // path: no flat), and whether the method reads corrected pixels.
  bool folded() const { return folded_; }
  bool needs_pixels() const { return needs_pixels_; }
  SimdLevel simd() const { return simd_; }

  // A correlation reference from a frame already measured by this pipeline:
  // the mean of its valid subapertures' corrected boxes, each moved by its
  // slope rounded to whole pixels so that the mean is not blurred by the
  // spread of slopes (pixels no box covers after the move stay 0), then
  // normalised to unit sum; pitch x pitch floats. For extended scenes, where
  // every subaperture sees the same scene. Allocates (it runs on request,
  // not per frame). Returns a sentence instead when no subaperture is valid.
  std::variant<std::vector<float>, std::string> capture_reference(const ImageView& image,
                                                                  const FrameMeasurement& measured) const;

 private:
  // Pass 2 of measure(): flags, slopes and frame figures from the per-box
  // results of pass 1.
  void decide(FrameMeasurement& out);
  struct Lane;
  bool is_bad(int x, int y) const;
  // Folded path: box i's bad-pixel repairs into lane.patches.
  void repair_folded(const ImageView& image, int i, Lane& lane) const;
  // The brightest raw pixel of the box that is not bad.
  double good_raw_max(const ImageView& image, const Box& box) const;

  // One thread's scratch.
  struct Lane {
    Lane(const PipelineSettings& s, int max_run, bool strip, bool raw_columns);
    std::unique_ptr<Centroider> centroider;
    std::vector<float> strip;                // one corrected row of boxes (when pixels are read)
    std::vector<float> column_max;           // raw maximum of each strip column (float path)
    std::vector<float> rings;                // the run's border rings, ring_stride apart
    std::vector<float> ring_soa;             // border_stats_batch's scratch
    MomentAccumulator moments;               // float path
    std::vector<WindowMoments> strip_moments;
    std::vector<std::uint32_t> col_s, col_sy, col_syy, col_max;  // raw column sums (folded path)
    std::vector<float> raw_box;              // one box's raw pixels, to count saturated ones
    std::vector<PixelPatch> patches;         // one box's bad-pixel repairs (folded path)
    std::vector<float> levels;               // the run's boxes' background levels (0 when not subtracted)
    std::vector<WindowMoments> run_moments;  // the run's boxes' moments (folded path)
  };

  // A bad pixel and its good neighbours (of the 8, those inside the same
  // run of boxes): strip indices for the float path, frame coordinates for
  // the folded path, where the repair is a patch to the box's sums.
  struct BadFix {
    int at = 0;             // strip index
    int lx = 0, ly = 0;     // box-local
    int fx = 0, fy = 0;     // frame
    int n = 0;
    int from[8] = {};       // strip indices
    int from_x[8] = {}, from_y[8] = {};  // frame coordinates
  };

  PipelineSettings settings_;
  std::vector<float> offset_;           // dark + sky, per pixel; empty when neither is set
  std::vector<float> gain_;             // 1 / flat, 0 at bad pixels; empty when neither is set
  std::vector<BadFix> bad_fixes_;       // grouped by box, boxes in index order
  std::vector<int> box_fixes_;          // box i's fixes: [box_fixes_[i], box_fixes_[i+1])
  std::vector<SubapertureBox> boxes_;
  std::vector<BoxRun> runs_;
  std::vector<double> offset_x_, offset_y_;  // per box: x0 - ref_x - reference slope (slope = local centroid + offset)
  bool folded_;
  bool needs_pixels_;
  SimdLevel simd_;
  RawColumnKernel kernel_;
  bool sums_fit_32_;  // box sums in 32-bit lanes (folded path; box_sums_fit_32)
  std::vector<FoldedDark> folded_dark_;  // per box (folded path)
  std::vector<float> ring_dark_;         // per box, its ring's dark values in ring order (folded path)
  int ring_pixels_ = 0;   // pixels in a box's border ring
  int ring_stride_ = 0;   // floats between two boxes' rings in Lane::rings
  std::vector<Lane> lanes_;
  std::vector<BorderStats> borders_;     // one per box of the grid
  std::vector<SpotEstimate> estimates_;  // one per box of the grid
  std::vector<WindowContext> contexts_;  // one per box of the grid
  std::vector<float> raw_max_;           // raw maximum per box of the grid
  std::vector<std::uint32_t> saturated_pixels_;  // per box of the grid
  std::vector<float> sigmas_;            // scratch: for the frame's median pixel noise
  std::vector<float> fwhms_;             // scratch: for the frame's median FWHM
  std::vector<double> snrs_;             // scratch: each box's flux significance (decide)
  std::vector<SpotShape> shapes_;        // scratch: each box's widths and ellipticity (decide)
  float saturation_adu_;                 // resolved settings_.saturation_adu
};

}  // namespace slopecast::core

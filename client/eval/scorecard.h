// How well one centroider configuration did over a set of frames: the
// figures `slopecast eval` reports, accumulated frame by frame from the
// pipeline's own FrameMeasurement (so what is scored is exactly what the
// daemon would publish), against the truth when there is one.
//
// With truth (the true spot shift of every subaperture, px, and the lit
// fraction the simulator knows), over the subapertures the truth calls
// usable (lit fraction >= usable_fraction) that the pipeline calls valid:
//   error e = measured slope - true shift, per axis;
//   bias = mean e; rms = sqrt(mean e^2) (bias included);
//   response gain and offset: the least-squares line measured = gain x true
//     + offset over the samples with |true| <= gain_within_px;
//   linear range: the largest |true| such that every bin of width bin_px
//     from 0 out to it (both signs) keeps its mean measured slope within
//     linear_tolerance_px of that line (the mean: noise averages out, a
//     bend does not; bins of fewer than 10 samples are passed over);
//   per subaperture, per flux level (bins of a factor 2 in measured flux)
//     and per bin of true shift (the response curve);
//   false rejects: usable but not valid; false accepts: not usable (too
//     little of it lit) but valid.
// Without truth: each slope's temporal standard deviation over the frames
// where it is valid (the noise, if the scene is static or the frames are
// many), flux and spot statistics. With a reference candidate measured on
// the same frames: the rms difference of the slopes both call valid.
#pragma once

#include <cstdint>
#include <map>
#include <span>
#include <vector>

#include "daemon/core/pipeline/frame_measurement.h"

namespace slopecast::eval {

struct ScoringSettings {
  double usable_fraction = 0.5;       // truth: a subaperture this much lit should be valid
  double bin_px = 0.1;                // width of the true-shift bins
  double gain_within_px = 1.0;        // the gain's fit uses |true shift| up to this
  double linear_tolerance_px = 0.05;  // a bin mean's departure from the line that ends the linear range
};

// One frame's truth; illuminated may be empty (all fully lit).
struct TruthView {
  std::span<const float> dx_px, dy_px, illuminated;
};

// Sums for a least-squares line and an rms about it.
struct LineSums {
  double n = 0, t = 0, m = 0, tt = 0, mm = 0, tm = 0;
  void add(double truth, double measured);
  void merge(const LineSums& o);
  // Mean squared departure from measured = gain t + offset.
  double mean_square_about(double gain, double offset) const;
};

// Running mean and variance (Welford).
struct Spread {
  double n = 0, mean = 0, m2 = 0;
  void add(double x);
  double variance() const { return n > 1 ? m2 / (n - 1) : 0.0; }
};

struct AxisFigures {
  double bias_px = 0, rms_px = 0;
  double gain = 0, offset_px = 0;
  double linear_range_px = 0;
};

struct ResponsePoint {
  double true_px = 0, measured_px = 0, rms_error_px = 0;
  double samples = 0;
};

struct FluxBin {
  double flux_lo_adu = 0, flux_hi_adu = 0;
  double samples = 0;
  double rms_error_px = 0;  // both axes pooled
};

struct Summary {
  std::uint64_t frames = 0;
  bool has_truth = false;
  // With truth.
  double samples = 0;  // subaperture-frames scored (usable and valid)
  AxisFigures x, y;
  double rms_px = 0;   // sqrt((rms_x^2 + rms_y^2) / 2)
  double false_reject_fraction = 0;  // of usable subaperture-frames
  double false_accept_fraction = 0;  // of unusable ones (0 when there are none)
  double usable = 0, unusable = 0, false_rejects = 0, false_accepts = 0;
  std::vector<double> rms_by_subaperture_px;  // NaN where never scored
  std::vector<FluxBin> by_flux;
  std::vector<ResponsePoint> response_x, response_y;
  // Always.
  double valid_fraction = 0;                 // of every subaperture-frame
  std::vector<double> noise_by_subaperture_px;  // temporal std, pooled axes; NaN with < 2 valid frames
  double median_noise_px = 0;                // median of the above (finite ones)
  double mean_flux_adu = 0;                  // valid subapertures
  double mean_fwhm_px = 0;                   // mean of each frame's median FWHM
  std::map<std::uint32_t, std::uint64_t> invalid_reasons;  // flag bit -> subaperture-frames carrying it
  // Against the reference candidate (NaN without one).
  double agreement_rms_px = 0;
  // Measurement time per frame (this process, one thread).
  double median_us = 0, mean_us = 0;
};

class Scorecard {
 public:
  Scorecard(int n_subapertures, ScoringSettings settings);
  // One measured frame; truth and reference (another candidate's
  // measurement of the same frame) may be null. seconds: the time measure()
  // took.
  void add(const core::FrameMeasurement& m, const TruthView* truth, const core::FrameMeasurement* reference,
           double seconds);
  Summary summary() const;
  std::uint64_t frames() const { return frames_; }

 private:
  ScoringSettings s_;
  int n_;
  std::uint64_t frames_ = 0;
  bool has_truth_ = false, has_reference_ = false;
  Spread err_x_, err_y_;
  double sq_x_ = 0, sq_y_ = 0, scored_ = 0;
  double usable_ = 0, unusable_ = 0, false_rejects_ = 0, false_accepts_ = 0;
  std::map<int, LineSums> bins_x_, bins_y_;      // by floor(true / bin_px)
  std::map<int, std::pair<double, double>> flux_;  // by floor(log2 flux): samples, sum e^2 (both axes)
  std::vector<double> sub_sq_, sub_n_;
  std::vector<Spread> noise_x_, noise_y_;
  double valid_ = 0, all_ = 0, flux_sum_ = 0, fwhm_sum_ = 0;
  std::map<std::uint32_t, std::uint64_t> reasons_;
  double agree_sq_ = 0, agree_n_ = 0;
  std::vector<float> times_us_;
};

}  // namespace slopecast::eval

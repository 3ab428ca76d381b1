#include "client/eval/scorecard.h"

#include <algorithm>
#include <cmath>
#include <limits>

namespace slopecast::eval {

namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
// Bins with fewer samples neither end nor extend the linear range: their
// mean is too noisy to judge a bend by.
constexpr double kMinBinSamples = 10;

double median_of(std::vector<double> v) {
  std::erase_if(v, [](double x) { return !std::isfinite(x); });
  if (v.empty()) return kNaN;
  const auto mid = v.begin() + static_cast<std::ptrdiff_t>(v.size() / 2);
  std::nth_element(v.begin(), mid, v.end());
  if (v.size() % 2) return *mid;
  return 0.5 * (*mid + *std::max_element(v.begin(), mid));
}

// Gain, offset and linear range of one axis from its bins of true shift.
AxisFigures axis_figures(const std::map<int, LineSums>& bins, const ScoringSettings& s) {
  AxisFigures f;
  LineSums fit, all;
  const int k_in = static_cast<int>(std::lround(s.gain_within_px / s.bin_px));
  for (const auto& [k, b] : bins) {
    all.merge(b);
    if (k >= -k_in && k + 1 <= k_in) fit.merge(b);
  }
  if (fit.n < 2) fit = all;
  const double var_t = fit.tt - fit.t * fit.t / std::max(fit.n, 1.0);
  if (fit.n < 2 || !(var_t > 1e-12 * std::max(fit.n, 1.0))) {
    f.gain = f.offset_px = f.linear_range_px = kNaN;  // no spread of true shifts: no line
    return f;
  }
  f.gain = (fit.tm - fit.t * fit.m / fit.n) / var_t;
  f.offset_px = (fit.m - f.gain * fit.t) / fit.n;
  // Outward from 0, both signs together; empty bins neither end the range
  // nor extend it.
  int outermost = 0;
  for (const auto& [k, b] : bins) outermost = std::max(outermost, k >= 0 ? k : -k - 1);
  for (int d = 0; d <= outermost; ++d) {
    bool any = false, within = true;
    for (int k : {d, -d - 1}) {
      auto it = bins.find(k);
      if (it == bins.end() || it->second.n < kMinBinSamples) continue;
      any = true;
      const LineSums& b = it->second;
      if (std::abs(b.m / b.n - (f.gain * b.t / b.n + f.offset_px)) > s.linear_tolerance_px) within = false;
    }
    if (!any) continue;
    if (!within) break;
    f.linear_range_px = (d + 1) * s.bin_px;
  }
  return f;
}

std::vector<ResponsePoint> response_of(const std::map<int, LineSums>& bins) {
  std::vector<ResponsePoint> out;
  for (const auto& [k, b] : bins) {
    if (b.n == 0) continue;
    ResponsePoint p;
    p.samples = b.n;
    p.true_px = b.t / b.n;
    p.measured_px = b.m / b.n;
    p.rms_error_px = std::sqrt(std::max(0.0, (b.mm - 2 * b.tm + b.tt) / b.n));
    out.push_back(p);
  }
  return out;
}

}  // namespace

void LineSums::add(double truth, double measured) {
  n += 1;
  t += truth;
  m += measured;
  tt += truth * truth;
  mm += measured * measured;
  tm += truth * measured;
}

void LineSums::merge(const LineSums& o) {
  n += o.n;
  t += o.t;
  m += o.m;
  tt += o.tt;
  mm += o.mm;
  tm += o.tm;
}

double LineSums::mean_square_about(double gain, double offset) const {
  if (n == 0) return 0.0;
  const double ss = mm - 2 * gain * tm - 2 * offset * m + gain * gain * tt + 2 * gain * offset * t + offset * offset * n;
  return ss / n;
}

void Spread::add(double x) {
  n += 1;
  const double d = x - mean;
  mean += d / n;
  m2 += d * (x - mean);
}

Scorecard::Scorecard(int n_subapertures, ScoringSettings settings)
    : s_(settings), n_(n_subapertures), sub_sq_(n_subapertures, 0.0), sub_n_(n_subapertures, 0.0),
      noise_x_(n_subapertures), noise_y_(n_subapertures) {}

void Scorecard::add(const core::FrameMeasurement& m, const TruthView* truth, const core::FrameMeasurement* reference,
                    double seconds) {
  ++frames_;
  times_us_.push_back(static_cast<float>(seconds * 1e6));
  if (truth) has_truth_ = true;
  if (reference) has_reference_ = true;
  for (int i = 0; i < n_; ++i) {
    const bool valid = m.flags[i] == core::kFlagNone;
    all_ += 1;
    if (valid) {
      valid_ += 1;
      flux_sum_ += m.flux_adu[i];
      noise_x_[i].add(m.slope_x_px[i]);
      noise_y_[i].add(m.slope_y_px[i]);
    } else {
      for (std::uint32_t bit = 1; bit; bit <<= 1)
        if (m.flags[i] & bit) ++reasons_[bit];
    }
    if (reference && valid && reference->flags[i] == core::kFlagNone) {
      const double dx = m.slope_x_px[i] - reference->slope_x_px[i];
      const double dy = m.slope_y_px[i] - reference->slope_y_px[i];
      agree_sq_ += dx * dx + dy * dy;
      agree_n_ += 2;
    }
    if (!truth) continue;
    const double lit = truth->illuminated.empty() ? 1.0 : truth->illuminated[i];
    const bool usable = lit >= s_.usable_fraction;
    if (!usable) {
      unusable_ += 1;
      if (valid) false_accepts_ += 1;
      continue;
    }
    usable_ += 1;
    if (!valid) {
      false_rejects_ += 1;
      continue;
    }
    const double tx = truth->dx_px[i], ty = truth->dy_px[i];
    const double ex = m.slope_x_px[i] - tx, ey = m.slope_y_px[i] - ty;
    err_x_.add(ex);
    err_y_.add(ey);
    sq_x_ += ex * ex;
    sq_y_ += ey * ey;
    scored_ += 1;
    sub_sq_[i] += ex * ex + ey * ey;
    sub_n_[i] += 2;
    bins_x_[static_cast<int>(std::floor(tx / s_.bin_px))].add(tx, m.slope_x_px[i]);
    bins_y_[static_cast<int>(std::floor(ty / s_.bin_px))].add(ty, m.slope_y_px[i]);
    if (m.flux_adu[i] > 0) {
      auto& f = flux_[static_cast<int>(std::floor(std::log2(m.flux_adu[i])))];
      f.first += 2;
      f.second += ex * ex + ey * ey;
    }
  }
  fwhm_sum_ += m.median_fwhm_px;
}

Summary Scorecard::summary() const {
  Summary out;
  out.frames = frames_;
  out.has_truth = has_truth_;
  out.valid_fraction = all_ > 0 ? valid_ / all_ : kNaN;
  out.mean_flux_adu = valid_ > 0 ? flux_sum_ / valid_ : kNaN;
  out.mean_fwhm_px = frames_ ? fwhm_sum_ / static_cast<double>(frames_) : kNaN;
  out.invalid_reasons = reasons_;
  out.noise_by_subaperture_px.assign(n_, kNaN);
  for (int i = 0; i < n_; ++i)
    if (noise_x_[i].n >= 2) out.noise_by_subaperture_px[i] = std::sqrt(0.5 * (noise_x_[i].variance() + noise_y_[i].variance()));
  out.median_noise_px = median_of(out.noise_by_subaperture_px);
  out.agreement_rms_px = has_reference_ && agree_n_ > 0 ? std::sqrt(agree_sq_ / agree_n_) : kNaN;
  if (!times_us_.empty()) {
    std::vector<double> t(times_us_.begin(), times_us_.end());
    double sum = 0;
    for (double v : t) sum += v;
    out.mean_us = sum / static_cast<double>(t.size());
    out.median_us = median_of(std::move(t));
  }
  if (!has_truth_) {
    out.x.bias_px = out.x.rms_px = out.y.bias_px = out.y.rms_px = out.rms_px = kNaN;
    out.x.gain = out.y.gain = out.x.offset_px = out.y.offset_px = kNaN;
    out.x.linear_range_px = out.y.linear_range_px = kNaN;
    out.false_accept_fraction = out.false_reject_fraction = kNaN;
    return out;
  }
  out.samples = scored_;
  out.usable = usable_;
  out.unusable = unusable_;
  out.false_rejects = false_rejects_;
  out.false_accepts = false_accepts_;
  out.false_reject_fraction = usable_ > 0 ? false_rejects_ / usable_ : kNaN;
  out.false_accept_fraction = unusable_ > 0 ? false_accepts_ / unusable_ : 0.0;
  out.x = axis_figures(bins_x_, s_);
  out.y = axis_figures(bins_y_, s_);
  out.x.bias_px = scored_ > 0 ? err_x_.mean : kNaN;
  out.y.bias_px = scored_ > 0 ? err_y_.mean : kNaN;
  out.x.rms_px = scored_ > 0 ? std::sqrt(sq_x_ / scored_) : kNaN;
  out.y.rms_px = scored_ > 0 ? std::sqrt(sq_y_ / scored_) : kNaN;
  out.rms_px = scored_ > 0 ? std::sqrt(0.5 * (sq_x_ + sq_y_) / scored_) : kNaN;
  out.rms_by_subaperture_px.assign(n_, kNaN);
  for (int i = 0; i < n_; ++i)
    if (sub_n_[i] > 0) out.rms_by_subaperture_px[i] = std::sqrt(sub_sq_[i] / sub_n_[i]);
  for (const auto& [k, f] : flux_)
    out.by_flux.push_back(FluxBin{std::ldexp(1.0, k), std::ldexp(1.0, k + 1), f.first, std::sqrt(f.second / f.first)});
  out.response_x = response_of(bins_x_);
  out.response_y = response_of(bins_y_);
  return out;
}

}  // namespace slopecast::eval

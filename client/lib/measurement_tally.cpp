#include "client/lib/measurement_tally.h"

#include <algorithm>
#include <cmath>

#include <fmt/format.h>

#include "daemon/core/metrics/percentile.h"

namespace slopecast::client {

std::uint64_t wall_clock_ns() {
  return static_cast<std::uint64_t>(std::chrono::duration_cast<std::chrono::nanoseconds>(
                                        std::chrono::system_clock::now().time_since_epoch())
                                        .count());
}

void MeasurementTally::add(const v1::Measurement& m, std::uint64_t received_ns) {
  const auto now = std::chrono::steady_clock::now();
  if (count_ == 0) first_ = now;
  last_ = now;
  ++count_;
  if (has_seq_ && m.frame_seq() > last_seq_ + 1) gaps_ += m.frame_seq() - last_seq_ - 1;
  last_seq_ = m.frame_seq();
  has_seq_ = true;
  if (m.camera_time_ns() > 0 && received_ns >= m.camera_time_ns())
    end_to_end_us_.push_back(static_cast<float>((received_ns - m.camera_time_ns()) / 1e3));
  if (m.published_time_ns() >= m.received_time_ns())
    daemon_us_.push_back(static_cast<float>((m.published_time_ns() - m.received_time_ns()) / 1e3));
  subaps_ = static_cast<std::uint32_t>(m.slope_x_size());
  for (int i = 0; i < m.slope_x_size() && i < m.valid_size(); ++i) {
    if (!m.valid(i)) continue;
    sum_x2_ += double(m.slope_x(i)) * m.slope_x(i);
    sum_y2_ += double(m.slope_y(i)) * m.slope_y(i);
    ++n_slopes_;
  }
  n_valid_ += m.n_valid();
}

TallySummary MeasurementTally::summary() const {
  TallySummary s;
  s.measurements = count_;
  s.seq_gaps = gaps_;
  s.subapertures = subaps_;
  const double span_s = std::chrono::duration<double>(last_ - first_).count();
  if (count_ > 1 && span_s > 0) s.rate_hz = (count_ - 1) / span_s;
  auto percentiles = [](std::vector<float> v, double& median, double& p99) {
    if (v.empty()) return;
    std::sort(v.begin(), v.end());
    median = core::nearest_rank(std::span<const float>(v), 0.5);
    p99 = core::nearest_rank(std::span<const float>(v), 0.99);
  };
  percentiles(end_to_end_us_, s.end_to_end_median_us, s.end_to_end_p99_us);
  percentiles(daemon_us_, s.daemon_median_us, s.daemon_p99_us);
  if (n_slopes_) {
    s.slope_rms_x_px = std::sqrt(sum_x2_ / n_slopes_);
    s.slope_rms_y_px = std::sqrt(sum_y2_ / n_slopes_);
  }
  if (count_) s.mean_valid = double(n_valid_) / count_;
  return s;
}

void MeasurementTally::clear() { *this = MeasurementTally{}; }

std::string format_tally_line(const TallySummary& s) {
  return fmt::format(
      "{:6d} meas  {:7.1f} Hz  latency cam->here {:7.1f}/{:7.1f} us (median/p99), daemon {:6.1f}/{:6.1f} us  "
      "slope rms x {:.3f} y {:.3f} px  valid {:.1f}/{}  gaps {}",
      s.measurements, s.rate_hz, s.end_to_end_median_us, s.end_to_end_p99_us, s.daemon_median_us,
      s.daemon_p99_us, s.slope_rms_x_px, s.slope_rms_y_px, s.mean_valid, s.subapertures, s.seq_gaps);
}

}  // namespace slopecast::client

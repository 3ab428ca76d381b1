// Running summary of received measurements, for `slopecast watch` and tests:
// counts, rate, latencies, slope rms and valid subapertures.
#pragma once

#include <chrono>
#include <cstdint>
#include <string>
#include <vector>

#include "slopecast/v1/measurement.pb.h"

namespace slopecast::client {

struct TallySummary {
  std::uint64_t measurements = 0;
  std::uint64_t seq_gaps = 0;          // frames missing between consecutive seqs
  double rate_hz = 0.0;                // measurements per second of wall time
  // camera exposure start -> measurement received here, us (same-host clocks)
  double end_to_end_median_us = 0.0, end_to_end_p99_us = 0.0;
  // daemon: frame received -> measurement published, us
  double daemon_median_us = 0.0, daemon_p99_us = 0.0;
  double slope_rms_x_px = 0.0, slope_rms_y_px = 0.0;  // over all valid slopes
  double mean_valid = 0.0;  // valid subapertures per frame
  std::uint32_t subapertures = 0;
};

class MeasurementTally {
 public:
  // received_ns: wall clock (ns since the Unix epoch) when m arrived here.
  void add(const v1::Measurement& m, std::uint64_t received_ns);
  TallySummary summary() const;
  std::uint64_t count() const { return count_; }
  // Starts a new interval (for the periodic live lines) but keeps nothing.
  void clear();

 private:
  std::vector<float> end_to_end_us_, daemon_us_;
  double sum_x2_ = 0.0, sum_y2_ = 0.0;
  std::uint64_t n_slopes_ = 0, n_valid_ = 0, count_ = 0, gaps_ = 0;
  std::uint64_t last_seq_ = 0;
  bool has_seq_ = false;
  std::uint32_t subaps_ = 0;
  std::chrono::steady_clock::time_point first_{}, last_{};
};

// Current wall clock in ns since the Unix epoch.
std::uint64_t wall_clock_ns();

// One-line human summary, e.g. for watch's live view.
std::string format_tally_line(const TallySummary& s);

}  // namespace slopecast::client

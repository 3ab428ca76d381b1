#include "daemon/app/daemon_stats.h"

#include <algorithm>
#include <numeric>

#include "daemon/core/metrics/percentile.h"

namespace slopecast::app {

DaemonStats::DaemonStats(int latency_window_frames, std::uint64_t max_seq_jump)
    : latency_us_(static_cast<std::size_t>(std::max(1, latency_window_frames)), 0.0f),
      max_seq_jump_(max_seq_jump) {}

std::uint64_t DaemonStats::rejected_total() const {
  return std::accumulate(rejected_.begin(), rejected_.end(), std::uint64_t{0});
}

SeqStep DaemonStats::note_seq(std::uint64_t seq) {
  SeqStep step = SeqStep::kFirst;
  if (has_last_seq) {
    // seq - last_seq cannot overflow: it is only taken when seq > last_seq.
    if (seq == last_seq) step = SeqStep::kRepeat;
    else if (seq < last_seq) step = SeqStep::kBackwards;
    else if (seq - last_seq == 1) step = SeqStep::kNext;
    else if (seq - last_seq - 1 <= max_seq_jump_) step = SeqStep::kGap;
    else step = SeqStep::kJump;
  }
  switch (step) {
    case SeqStep::kGap: frames_missed += seq - last_seq - 1; break;
    case SeqStep::kRepeat: ++frames_repeated; break;
    case SeqStep::kBackwards:
    case SeqStep::kJump: ++seq_restarts; break;
    case SeqStep::kFirst:
    case SeqStep::kNext: break;
  }
  last_seq = seq;
  has_last_seq = true;
  return step;
}

void DaemonStats::record_latency_us(float us) {
  latency_us_[latency_next_] = us;
  latency_next_ = (latency_next_ + 1) % latency_us_.size();
  latency_filled_ = std::min(latency_filled_ + 1, latency_us_.size());
}

LatencySummary DaemonStats::latency() const {
  LatencySummary s;
  if (latency_filled_ == 0) return s;
  std::vector<float> v(latency_us_.begin(), latency_us_.begin() + latency_filled_);
  std::sort(v.begin(), v.end());
  const std::span<const float> sorted(v);
  s.median_us = core::nearest_rank(sorted, 0.5);
  s.p99_us = core::nearest_rank(sorted, 0.99);
  s.max_us = v.back();
  s.frames = static_cast<std::uint32_t>(v.size());
  return s;
}

void DaemonStats::tick(double period_s) {
  if (period_s > 0.0)
    frame_rate_hz = static_cast<double>(frames_processed - processed_at_last_tick_) / period_s;
  processed_at_last_tick_ = frames_processed;
  ticked_ = true;
}

void DaemonStats::rate_since_start(double uptime_s) {
  if (!ticked_ && uptime_s > 0.0) frame_rate_hz = static_cast<double>(frames_processed) / uptime_s;
}

}  // namespace slopecast::app

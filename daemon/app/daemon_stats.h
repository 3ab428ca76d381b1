// Counters and the latency window of a running daemon.
//
// Owned and touched only by the daemon's loop thread; the control handler
// reads it on the same thread, so nothing here locks. Recording a frame is a
// few stores into pre-allocated arrays; the statistics that need sorting are
// computed only when a status request asks for them.
#pragma once

#include <array>
#include <cstdint>
#include <vector>

#include "daemon/core/frame/frame_check.h"

namespace slopecast::app {

struct LatencySummary {
  double median_us = 0.0;
  double p99_us = 0.0;
  double max_us = 0.0;
  std::uint32_t frames = 0;  // how many frames the figures cover
};

// How an accepted frame's seq relates to the previous one.
enum class SeqStep {
  kFirst,      // the first accepted frame
  kNext,       // previous + 1
  kGap,        // previous + 1 + g, 0 < g <= max_seq_jump: g frames missed
  kRepeat,     // equal to the previous
  kBackwards,  // smaller than the previous: a camera restart or reordering
  kJump,       // ahead by more than max_seq_jump: a restart or a corrupt header
};

class DaemonStats {
 public:
  DaemonStats(int latency_window_frames, std::uint64_t max_seq_jump);

  std::uint64_t frames_received = 0;
  std::uint64_t frames_processed = 0;
  std::uint64_t measurements_published = 0;
  std::uint64_t frames_missed = 0;    // forward seq gaps among accepted frames
  std::uint64_t frames_repeated = 0;  // seq equal to the previous
  std::uint64_t seq_restarts = 0;     // backwards steps and over-large jumps
  std::uint64_t frame_connection_drops = 0;
  // Frames taken off the socket but not measured because a newer one was
  // already queued (newest_frame_only).
  std::uint64_t frames_skipped = 0;
  std::uint64_t last_seq = 0;
  bool has_last_seq = false;
  double frame_rate_hz = 0.0;  // updated by tick()

  void count_reject(core::FrameReject r) { ++rejected_[static_cast<std::size_t>(r)]; }
  std::uint64_t rejected(core::FrameReject r) const { return rejected_[static_cast<std::size_t>(r)]; }
  std::uint64_t rejected_total() const;

  // Notes an accepted frame's seq, counts it by SeqStep and returns the step.
  SeqStep note_seq(std::uint64_t seq);
  // Records one frame's latency, frame received -> measurement sent.
  void record_latency_us(float us);
  // Median, p99 and max over the window (sorts a copy: control path only).
  LatencySummary latency() const;
  // Called once per housekeeping period with its length, to update the rate.
  void tick(double period_s);
  // Rate before the first tick: processed frames over the uptime.
  void rate_since_start(double uptime_s);

 private:
  std::array<std::uint64_t, core::kFrameRejectCount> rejected_{};
  std::vector<float> latency_us_;  // ring buffer
  std::size_t latency_next_ = 0;
  std::size_t latency_filled_ = 0;
  std::uint64_t processed_at_last_tick_ = 0;
  std::uint64_t max_seq_jump_;
  bool ticked_ = false;
};

}  // namespace slopecast::app

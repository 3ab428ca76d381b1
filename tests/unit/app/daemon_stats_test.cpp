// The daemon's counters and latency percentiles.
#include <catch2/catch.hpp>

#include "daemon/app/daemon_stats.h"

using namespace slopecast;

TEST_CASE("latency percentiles are nearest-rank over the window", "[stats]") {
  // Nearest-rank percentile (the textbook definition, from memory): the
  // smallest sample with at least a fraction p of the samples at or below
  // it. Derived by counting for 1..100: median 50, p99 99.
  app::DaemonStats s(100);
  for (int i = 100; i >= 1; --i) s.record_latency_us(static_cast<float>(i));
  auto l = s.latency();
  CHECK(l.median_us == 50.0);
  CHECK(l.p99_us == 99.0);
  CHECK(l.max_us == 100.0);
  CHECK(l.frames == 100);
  // The window keeps only the newest 100: after 100 more of 1000 us, all are 1000.
  for (int i = 0; i < 100; ++i) s.record_latency_us(1000.0f);
  CHECK(s.latency().median_us == 1000.0);
}

TEST_CASE("sequence gaps among accepted frames are counted as missed", "[stats]") {
  app::DaemonStats s(16);
  s.note_seq(10);
  s.note_seq(11);
  s.note_seq(15);  // 12, 13, 14 missed
  s.note_seq(16);
  CHECK(s.frames_missed == 3);
  CHECK(s.last_seq == 16);
  s.note_seq(2);  // camera restarted: not a gap
  CHECK(s.frames_missed == 3);
}

TEST_CASE("rejections are counted per reason and the rate per tick", "[stats]") {
  app::DaemonStats s(16);
  s.count_reject(core::FrameReject::kPayloadSize);
  s.count_reject(core::FrameReject::kPayloadSize);
  s.count_reject(core::FrameReject::kBadHeader);
  CHECK(s.rejected(core::FrameReject::kPayloadSize) == 2);
  CHECK(s.rejected_total() == 3);
  s.frames_processed = 500;
  s.tick(0.5);
  CHECK(s.frame_rate_hz == 1000.0);
  s.frames_processed = 600;
  s.tick(1.0);
  CHECK(s.frame_rate_hz == 100.0);
}

// The daemon's counters and latency percentiles.
#include <catch2/catch.hpp>

#include "daemon/app/daemon_stats.h"

using namespace slopecast;

TEST_CASE("latency percentiles are nearest-rank over the window", "[stats]") {
  // Nearest-rank percentile (the textbook definition, from memory): the
  // smallest sample with at least a fraction p of the samples at or below
  // it. Derived by counting for 1..100: median 50, p99 99.
  app::DaemonStats s(100, 1000);
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
  app::DaemonStats s(16, 1000);
  s.note_seq(10);
  s.note_seq(11);
  s.note_seq(15);  // 12, 13, 14 missed
  s.note_seq(16);
  CHECK(s.frames_missed == 3);
  CHECK(s.last_seq == 16);
  CHECK(s.note_seq(2) == app::SeqStep::kBackwards);  // camera restarted: not a gap
  CHECK(s.frames_missed == 3);
  CHECK(s.seq_restarts == 1);
}

TEST_CASE("repeats, restarts and wild seqs are told apart from missed frames", "[stats]") {
  app::DaemonStats s(16, 1000);
  CHECK(s.note_seq(500) == app::SeqStep::kFirst);
  CHECK(s.note_seq(500) == app::SeqStep::kRepeat);
  CHECK(s.note_seq(501) == app::SeqStep::kNext);
  // One frame with a wild seq (a bit-flipped header, or 2^63): not 9.2e18
  // missed frames, but a restart; and the step back to normal is another.
  CHECK(s.note_seq(std::uint64_t{1} << 63) == app::SeqStep::kJump);
  CHECK(s.note_seq(502) == app::SeqStep::kBackwards);
  CHECK(s.note_seq(1503) == app::SeqStep::kGap);  // 1000 missed: at the bound
  CHECK(s.note_seq(2505) == app::SeqStep::kJump);  // 1001: beyond it
  CHECK(s.note_seq(UINT64_MAX) == app::SeqStep::kJump);
  CHECK(s.note_seq(0) == app::SeqStep::kBackwards);
  CHECK(s.frames_missed == 1000);
  CHECK(s.frames_repeated == 1);
  CHECK(s.seq_restarts == 5);
}

TEST_CASE("the rate is known before the first tick", "[stats]") {
  app::DaemonStats s(16, 1000);
  s.frames_processed = 300;
  s.rate_since_start(0.5);
  CHECK(s.frame_rate_hz == 600.0);
  s.tick(1.0);
  s.rate_since_start(2.0);  // ignored once a tick has happened
  CHECK(s.frame_rate_hz == 300.0);
}

TEST_CASE("rejections are counted per reason and the rate per tick", "[stats]") {
  app::DaemonStats s(16, 1000);
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

// The daemon's view of the camera, over real sockets: over-size frames do
// not make it deaf, seq restarts and repeats are told apart from missed
// frames, the stream goes stale and recovers, SIGHUP is survived.
#include <catch2/catch.hpp>

#include <signal.h>

#include <cmath>
#include <map>
#include <thread>

#include "client/lib/frame_publisher.h"
#include "client/lib/measurement_subscriber.h"
#include "client/sim/spot_field.h"
#include "tests/integration/daemon_harness.h"

using namespace slopecast;
using namespace std::chrono_literals;

namespace {

// 4 x 4 subapertures of 8 px on a 32 x 32 u16 camera; small frame cap so an
// over-size part is cheap to send.
const char* kConfig =
    "[camera]\nwidth_px = 32\nheight_px = 32\npixel_type = \"u16\"\n"
    "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 8\n"
    "[calibration]\nmin_flux_adu = 1000\n"
    "[daemon]\nmax_frame_bytes = 100000\nstale_after_s = 0.3\nmax_seq_jump = 1000\n";

std::string good_pixels() {
  sim::SpotFieldSettings field;
  field.grid = {4, 4, 8, 0, 0};
  field.photons_per_spot = 5e4;
  sim::SpotOffsets o;
  o.dx_px.assign(16, 0.3);
  o.dy_px.assign(16, -0.2);
  const auto img = sim::render_spot_field(field, o, 32, 32);
  std::string px(32 * 32 * 2, '\0');
  for (std::size_t i = 0; i < img.size(); ++i) {
    const auto v = static_cast<std::uint16_t>(std::lround(img[i] + 100.0));
    std::memcpy(px.data() + 2 * i, &v, 2);
  }
  return px;
}

void send(client::FramePublisher& pub, std::uint64_t seq, const std::string& px, int w = 32, int h = 32) {
  auto hd = client::make_frame_header(seq, 1, w, h, v1::PIXEL_TYPE_U16);
  hd.set_source_id("bench-cam-7");
  const std::string parts[] = {hd.SerializeAsString(), px};
  REQUIRE(pub.publish_parts(parts));
}

std::map<std::string, v1::RejectCount> rejects(const v1::StatusReply& s) {
  std::map<std::string, v1::RejectCount> m;
  for (const auto& r : s.rejected()) m[r.reason_name()] = r;
  return m;
}

}  // namespace

TEST_CASE("an over-size frame does not make the daemon deaf", "[integration][daemon][stream]") {
  testing::DaemonHarness h;
  REQUIRE(h.start(kConfig));
  client::MeasurementSubscriber sub(h.ctx, h.measurements_endpoint);
  REQUIRE(h.wait_for_subscribers(1));
  INFO("daemon log:\n" << h.log());
  const std::string px = good_pixels();
  {
    client::FramePublisher pub(h.ctx, h.frames_endpoint);
    REQUIRE(pub.wait_for_subscriber(10s));
    send(pub, 0, px);
    REQUIRE(sub.receive(5s));
    // A full-sensor frame (1 MB) into the 32 x 32 camera: over max_frame_bytes.
    send(pub, 1, std::string(512 * 1024 * 2, '\0'), 512, 1024);
    // The same publisher goes on: the daemon reconnects and measures again.
    // (Frames sent while the connection is down are lost, so send until one
    // arrives, bounded.)
    std::optional<v1::Measurement> m;
    for (std::uint64_t seq = 3; seq < 200 && !m; ++seq) {
      send(pub, seq, px);
      m = sub.receive(100ms);
    }
    REQUIRE(m);
    CHECK(m->n_valid() == 16);
    // A frame that fits under the cap but is the wrong size: received whole
    // and rejected with what arrived; the connection stays.
    send(pub, 500, std::string(64 * 64 * 2, '\0'), 64, 64);
    send(pub, 501, px);
    m = sub.receive(5s);
    REQUIRE(m);
    CHECK(m->frame_seq() == 501);
  }
  // The camera restarts: a new publisher on the same endpoint.
  {
    client::FramePublisher pub(h.ctx, h.frames_endpoint);
    REQUIRE(pub.wait_for_subscriber(10s));
    send(pub, 0, px);
    auto m = sub.receive(5s);
    REQUIRE(m);
    CHECK(m->frame_seq() == 0);
  }
  const auto s = h.status();
  CHECK(s.frame_connection_drops() >= 1);
  CHECK(s.max_frame_bytes() == 100000);
  const auto r = rejects(s);
  CHECK(r.at("dimensions_mismatch").count() >= 1);
  CHECK(r.at("dimensions_mismatch").last_detail() == "64 x 64 u16, expected 32 x 32 u16");
  CHECK_THAT(h.log(), Catch::Contains("max_frame_bytes = 100000") && Catch::Contains("reconnecting"));
  CHECK_THAT(h.log(), Catch::Contains("64 x 64 u16, expected 32 x 32 u16"));
  CHECK(h.stop(1000ms) == 0);
}

TEST_CASE("seq restarts, repeats and wild seqs are not missed frames; the stream goes stale and recovers",
          "[integration][daemon][stream]") {
  testing::DaemonHarness h;
  REQUIRE(h.start(kConfig));
  client::FramePublisher pub(h.ctx, h.frames_endpoint);
  client::MeasurementSubscriber sub(h.ctx, h.measurements_endpoint);
  REQUIRE(pub.wait_for_subscriber(10s));
  REQUIRE(h.wait_for_subscribers(1));
  INFO("daemon log:\n" << h.log());
  CHECK(h.status().stream_state() == v1::STREAM_STATE_WAITING);
  const std::string px = good_pixels();
  const std::uint64_t seqs[] = {100, 101, 101, 105, std::uint64_t{1} << 63, 106, 3, 4};
  for (std::uint64_t seq : seqs) {
    send(pub, seq, px);
    REQUIRE(sub.receive(5s));  // one at a time: order and arrival are certain
  }
  auto s = h.status();
  CHECK(s.frames_missed() == 3);     // 102..104
  CHECK(s.frames_repeated() == 1);   // 101 twice
  CHECK(s.seq_restarts() == 3);      // up to 2^63, back to 106, back to 3
  CHECK(s.last_seq() == 4);
  CHECK(s.last_source_id() == "bench-cam-7");
  CHECK(s.stream_state() == v1::STREAM_STATE_OK);
  CHECK(s.stream_state_name() == "ok");
  CHECK(s.frame_rate_hz() > 0.0);  // known before the first housekeeping second too

  // No frame for longer than stale_after_s (0.3 s): stale, bounded wait.
  const auto deadline = std::chrono::steady_clock::now() + 10s;
  while (h.status().stream_state() != v1::STREAM_STATE_STALE && std::chrono::steady_clock::now() < deadline)
    std::this_thread::sleep_for(50ms);
  s = h.status();
  CHECK(s.stream_state_name() == "stale");
  CHECK(s.last_frame_age_s() >= 0.3);
  send(pub, 5, px);
  REQUIRE(sub.receive(5s));
  CHECK(h.status().stream_state() == v1::STREAM_STATE_OK);
  CHECK_THAT(h.log(), Catch::Contains("taken as a camera restart"));
  CHECK(h.stop(1000ms) == 0);
}

TEST_CASE("SIGHUP is logged and ignored", "[integration][daemon]") {
  testing::DaemonHarness h;
  REQUIRE(h.start(kConfig));
  h.signal(SIGHUP);
  const auto deadline = std::chrono::steady_clock::now() + 5s;
  while (h.log().find("SIGHUP") == std::string::npos && std::chrono::steady_clock::now() < deadline)
    std::this_thread::sleep_for(20ms);
  INFO("daemon log:\n" << h.log());
  CHECK_THAT(h.log(), Catch::Contains("SIGHUP received and ignored"));
  CHECK(h.status().frames_received() == 0);  // still answering
  CHECK(h.stop(1000ms) == 0);
}

TEST_CASE("with newest_frame_only a backlog is skipped to the newest frame, and counted", "[integration][daemon]") {
  // A Gaussian fit per box makes each frame cost a millisecond or more,
  // while the simulator sends 200 small frames as fast as it can without
  // loss (--block-when-full, deep queues): frames pile up in the daemon's
  // queue. Newest wins: every frame is either measured or skipped, the last
  // one sent is measured, and nothing is lost on the way.
  testing::DaemonHarness h;
  REQUIRE(h.start("[camera]\nwidth_px = 60\nheight_px = 60\npixel_type = \"u16\"\n"
                  "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 15\n"
                  "[centroider]\nmethod = \"gaussian_fit\"\nspot_sigma_px = 0.9\n"
                  "[daemon]\nframe_queue_depth = 1000\nmeasurement_queue_depth = 1000\nnewest_frame_only = true\n"));
  client::MeasurementSubscriber sub(h.ctx, h.measurements_endpoint);
  REQUIRE(h.wait_for_subscribers(1));
  testing::ChildProcess sim(SLOPECAST_PATH,
                            {"sim", "--frames-out", h.frames_endpoint, "--frames", "200", "--rate-hz", "100000",
                             "--distinct-frames", "4", "--block-when-full", "--subapertures-x", "4",
                             "--subapertures-y", "4", "--pitch-px", "15"},
                            h.dir / "sim.log");
  REQUIRE(sim.wait(30s) == 0);
  // Wait (bounded) until the daemon has accounted for all 200.
  v1::StatusReply s;
  const auto deadline = std::chrono::steady_clock::now() + 20s;
  do {
    s = h.status();
  } while (s.frames_processed() + s.frames_skipped() < 200 && std::chrono::steady_clock::now() < deadline);
  INFO("daemon log:\n" << h.log());
  CHECK(s.newest_frame_only());
  CHECK(s.frames_received() == 200u);
  CHECK(s.frames_processed() + s.frames_skipped() == 200u);
  CHECK(s.frames_skipped() > 0u);
  CHECK(s.frames_missed() == 0u);  // skipped frames are not the camera's gaps
  std::uint64_t last = 0;
  while (auto m = sub.receive(200ms)) last = m->frame_seq();
  CHECK(last == 199u);
}

// Malformed frames and requests sent over the real sockets: the daemon stays
// up, counts each under its reason, and measures the next good frame.
#include <catch2/catch.hpp>

#include <cmath>
#include <fstream>
#include <map>

#include "client/lib/frame_publisher.h"
#include "client/lib/measurement_subscriber.h"
#include "client/sim/spot_field.h"
#include "tests/integration/daemon_harness.h"

using namespace slopecast;
using namespace std::chrono_literals;

namespace {

// 4 x 4 subapertures of 8 px on a 32 x 32 u16 camera, no dark. The noiseless
// spots below come within 3 sigma of their 8 px boxes' edges, so their tails
// light the border ring; background estimation is off so the slopes can be
// checked to 3e-3 px (the border background has its own tests).
const char* kConfig =
    "[camera]\nwidth_px = 32\nheight_px = 32\npixel_type = \"u16\"\n"
    "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 8\n"
    "[calibration]\nmin_flux_adu = 1000\nbackground = \"none\"\n";

// A noiseless frame whose spot in subaperture i is offset by (0.1 i - 0.8, 0.6 - 0.07 i) px.
struct GoodFrame {
  std::vector<std::uint16_t> pixels;
  sim::SpotOffsets offsets;
};
GoodFrame good_frame() {
  sim::SpotFieldSettings field;
  field.grid = {4, 4, 8, 0, 0};
  field.spot_sigma_px = 0.9;
  field.photons_per_spot = 5e4;
  GoodFrame f;
  for (int i = 0; i < 16; ++i) {
    f.offsets.dx_px.push_back(0.1 * i - 0.8);
    f.offsets.dy_px.push_back(0.6 - 0.07 * i);
  }
  const auto img = sim::render_spot_field(field, f.offsets, 32, 32);
  for (double v : img) f.pixels.push_back(static_cast<std::uint16_t>(std::lround(v)));
  return f;
}

std::string bytes_of(const std::vector<std::uint16_t>& px) {
  return {reinterpret_cast<const char*>(px.data()), px.size() * 2};
}

}  // namespace

TEST_CASE("bad frames are rejected by reason and the next good frame is measured", "[integration][daemon]") {
  testing::DaemonHarness h;
  REQUIRE(h.start(kConfig));
  client::FramePublisher pub(h.ctx, h.frames_endpoint);
  client::MeasurementSubscriber sub(h.ctx, h.measurements_endpoint);
  REQUIRE(pub.wait_for_subscriber(10s));
  REQUIRE(h.wait_for_subscribers(1));
  INFO("daemon log:\n" << h.log());

  const GoodFrame good = good_frame();
  const std::string pixels = bytes_of(good.pixels);
  auto header = [](std::uint64_t seq) {
    return client::make_frame_header(seq, 1, 32, 32, v1::PIXEL_TYPE_U16);
  };
  auto send = [&](const v1::FrameHeader& hd, const std::string& px) {
    const std::string parts[] = {hd.SerializeAsString(), px};
    REQUIRE(pub.publish_parts(parts));
  };

  // A good frame first, so we know the path works before the bad ones.
  send(header(0), pixels);
  auto first = sub.receive(5s);
  REQUIRE(first);
  CHECK(first->frame_seq() == 0);

  // payload size not matching the header
  send(header(1), pixels.substr(0, pixels.size() - 2));
  // dimensions not matching the geometry (payload consistent with the header)
  {
    auto hd = client::make_frame_header(2, 1, 33, 32, v1::PIXEL_TYPE_U16);
    send(hd, std::string(33 * 32 * 2, '\0'));
  }
  // unknown pixel type code
  {
    auto hd = header(3);
    hd.set_pixel_type(static_cast<v1::PixelType>(9));
    send(hd, pixels);
  }
  // a known pixel type other than the configured one
  {
    auto hd = client::make_frame_header(4, 1, 32, 32, v1::PIXEL_TYPE_U8);
    send(hd, std::string(32 * 32, '\0'));
  }
  // row stride shorter than a row
  {
    auto hd = header(5);
    hd.set_row_stride_bytes(40);
    send(hd, pixels);
  }
  // garbage bytes as the header
  {
    const std::string parts[] = {std::string("\xff\xfe garbage \x01\x02", 13), pixels};
    REQUIRE(pub.publish_parts(parts));
  }
  // a header without the contract version (parses as an empty protobuf)
  {
    const std::string parts[] = {std::string(), pixels};
    REQUIRE(pub.publish_parts(parts));
  }
  // one-part message
  {
    const std::string parts[] = {header(6).SerializeAsString()};
    REQUIRE(pub.publish_parts(parts));
  }
  // three-part message
  {
    const std::string parts[] = {header(7).SerializeAsString(), pixels, "extra"};
    REQUIRE(pub.publish_parts(parts));
  }

  // The next good frame is measured correctly.
  send(header(8), pixels);
  auto next = sub.receive(5s);
  REQUIRE(next);
  CHECK(next->frame_seq() == 8);  // nothing was published for the bad frames
  REQUIRE(next->slope_x_size() == 16);
  CHECK(next->n_valid() == 16);
  for (int i = 0; i < 16; ++i) {
    // Noiseless, rounded to integers at 5e4 photons: < 1e-3 px (derived as in
    // the pipeline test); the spot is >= 3.5 sigma from its box edge (8 px box,
    // offsets up to 0.8 px), which moves the CoG by < 2e-3 px.
    CHECK(next->slope_x(i) == Approx(good.offsets.dx_px[i]).margin(3e-3));
    CHECK(next->slope_y(i) == Approx(good.offsets.dy_px[i]).margin(3e-3));
  }

  const v1::StatusReply s = h.status();
  std::map<std::string, std::uint64_t> by_reason;
  for (const auto& r : s.rejected()) by_reason[r.reason_name()] = r.count();
  CHECK(by_reason["payload_size"] == 1);
  CHECK(by_reason["dimensions_mismatch"] == 1);
  CHECK(by_reason["unknown_pixel_type"] == 1);
  CHECK(by_reason["pixel_type_mismatch"] == 1);
  CHECK(by_reason["bad_stride"] == 1);
  CHECK(by_reason["bad_header"] == 2);
  CHECK(by_reason["part_count"] == 2);
  CHECK(s.frames_rejected() == 9);
  CHECK(s.frames_received() == 11);
  CHECK(s.frames_processed() == 2);
  CHECK(s.measurements_published() == 2);
  CHECK(s.last_seq() == 8);

  // The log names the reasons.
  CHECK_THAT(h.log(), Catch::Contains("payload_size"));
  CHECK(h.stop(1000ms) == 0);
}

TEST_CASE("bad control requests get an error reply and the daemon stays up", "[integration][daemon]") {
  testing::DaemonHarness h;
  REQUIRE(h.start(kConfig));
  INFO("daemon log:\n" << h.log());

  // Bytes that are not a ControlRequest, straight over a REQ socket.
  zmq::socket_t req(h.ctx, zmq::socket_type::req);
  req.set(zmq::sockopt::linger, 0);
  req.set(zmq::sockopt::rcvtimeo, 5000);
  req.connect(h.control_endpoint);
  REQUIRE(req.send(zmq::str_buffer("\xff\xff\xff not protobuf")));
  zmq::message_t reply_msg;
  REQUIRE(req.recv(reply_msg));
  v1::ControlReply reply;
  REQUIRE(reply.ParseFromArray(reply_msg.data(), static_cast<int>(reply_msg.size())));
  CHECK_FALSE(reply.ok());
  CHECK_THAT(reply.error(), Catch::Contains("does not parse"));

  // An empty request (no command set).
  auto r = h.control().call(v1::ControlRequest{}, 5s);
  REQUIRE(std::holds_alternative<v1::ControlReply>(r));
  CHECK_FALSE(std::get<v1::ControlReply>(r).ok());
  CHECK_THAT(std::get<v1::ControlReply>(r).error(), Catch::Contains("empty request"));

  // Still answering.
  CHECK(h.status().frames_received() == 0);
  CHECK(h.stop(1000ms) == 0);
}

TEST_CASE("slopecastd refuses a bad config with a clear message", "[integration][daemon]") {
  testing::TempDir dir;
  std::ofstream(dir / "bad.toml") << "[camera]\nwidth_px = 32\nheight_px = 32\npixel_type = \"u16\"\n"
                                     "[lenslet_grid]\nsubapertures_x = 5\nsubapertures_y = 4\npitch_px = 8\n";
  {
    testing::ChildProcess check(SLOPECASTD_PATH, {"--check-config", (dir / "bad.toml").string()}, dir / "check.log");
    CHECK(check.wait(10s) == 1);
    CHECK_THAT(testing::read_log(dir / "check.log"), Catch::Contains("does not fit the camera"));
  }
  {
    testing::ChildProcess run(SLOPECASTD_PATH, {"--config", (dir / "bad.toml").string()}, dir / "run.log");
    CHECK(run.wait(10s) == 1);
  }
}

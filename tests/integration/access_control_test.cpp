// CURVE access control on the real daemon ([security]): keys made with
// ZeroMQ's own zmq_curve_keypair, a clients file with one client allowed to
// change and one allowed only to read. An unknown key gets no connection
// (and is counted), a read-only key cannot change anything, an allowed one
// works -- on the control endpoint and for measurements.
#include <catch2/catch.hpp>

#include <fstream>

#include "client/lib/frame_publisher.h"
#include "client/lib/measurement_subscriber.h"
#include "daemon/io/curve_keys.h"
#include "tests/integration/daemon_harness.h"

using namespace slopecast;
using namespace std::chrono_literals;
namespace fs = std::filesystem;

namespace {

io::CurveKeyPair make_keys() {
  char pub[41] = {}, sec[41] = {};
  REQUIRE(zmq_curve_keypair(pub, sec) == 0);
  return {pub, sec};
}

client::CurveClient as_client(const io::CurveKeyPair& server, const io::CurveKeyPair& me) {
  return {server.public_z85, me.public_z85, me.secret_z85};
}

v1::ControlRequest switch_to_wcog() {
  v1::ControlRequest r;
  auto* o = r.mutable_set_centroider()->add_options();
  o->set_key("method");
  o->set_text("wcog");
  return r;
}

}  // namespace

TEST_CASE("with [security], only listed keys connect and only role change may change", "[integration][security]") {
  REQUIRE(zmq_has("curve"));
  testing::DaemonHarness h;
  const auto server = make_keys(), operator_keys = make_keys(), viewer = make_keys(), stranger = make_keys();
  REQUIRE(io::write_key_file(h.dir / "daemon.key", server).empty());
  std::ofstream(h.dir / "clients.toml") << "[[client]]\nname = \"loop-operator\"\npublic = \"" << operator_keys.public_z85
                                        << "\"\nrole = \"change\"\n\n[[client]]\nname = \"viewer\"\npublic = \""
                                        << viewer.public_z85 << "\"\nrole = \"read\"\n";
  h.curve = as_client(server, operator_keys);
  REQUIRE(h.start("[camera]\nwidth_px = 32\nheight_px = 32\npixel_type = \"u16\"\n"
                  "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 8\n"
                  "[security]\nserver_key_file = \"daemon.key\"\nclients_file = \"clients.toml\"\n"));
  CHECK(h.status().access_control());

  // The operator may change the centroider.
  auto r = h.control().call(switch_to_wcog(), 5s);
  REQUIRE(std::holds_alternative<v1::ControlReply>(r));
  CHECK(std::get<v1::ControlReply>(r).ok());

  // The viewer may look, not change.
  client::ControlClient viewer_client(h.ctx, h.control_endpoint, as_client(server, viewer));
  auto look = viewer_client.status(5s);
  REQUIRE(std::holds_alternative<v1::ControlReply>(look));
  CHECK(std::get<v1::ControlReply>(look).ok());
  for (v1::ControlRequest req : {switch_to_wcog(), v1::ControlRequest{}}) {
    if (!req.has_set_centroider()) req.mutable_calibration()->set_save("mine");
    auto refused = viewer_client.call(req, 5s);
    REQUIRE(std::holds_alternative<v1::ControlReply>(refused));
    CHECK_FALSE(std::get<v1::ControlReply>(refused).ok());
    CHECK_THAT(std::get<v1::ControlReply>(refused).error(), Catch::Contains("may only read"));
  }
  v1::ControlRequest show;
  show.mutable_calibration()->set_show(true);
  auto shown = viewer_client.call(show, 5s);
  REQUIRE(std::holds_alternative<v1::ControlReply>(shown));
  CHECK(std::get<v1::ControlReply>(shown).ok());

  // A key not in the file, and no key at all: no connection, no reply.
  client::ControlClient stranger_client(h.ctx, h.control_endpoint, as_client(server, stranger));
  CHECK(std::holds_alternative<std::string>(stranger_client.status(1500ms)));
  client::ControlClient plain(h.ctx, h.control_endpoint);
  CHECK(std::holds_alternative<std::string>(plain.status(1500ms)));
  CHECK(h.status().connections_refused() >= 1u);

  // Measurements: the viewer's subscriber gets them, a keyless one does not.
  client::MeasurementSubscriber viewer_sub(h.ctx, h.measurements_endpoint, as_client(server, viewer));
  client::MeasurementSubscriber keyless(h.ctx, h.measurements_endpoint);
  REQUIRE(h.wait_for_subscribers(1));
  client::FramePublisher pub(h.ctx, h.frames_endpoint);
  REQUIRE(pub.wait_for_subscriber(10s));
  const std::string pixels(32 * 32 * 2, '\x10');
  const std::string parts[] = {client::make_frame_header(0, 1, 32, 32, v1::PIXEL_TYPE_U16).SerializeAsString(), pixels};
  REQUIRE(pub.publish_parts(parts));
  auto got = viewer_sub.receive(10s);
  REQUIRE(got);
  CHECK(got->frame_seq() == 0u);
  CHECK_FALSE(keyless.receive(500ms).has_value());
  CHECK(h.status().measurement_subscribers() == 1u);
  CHECK(h.stop(5s) == 0);
}

TEST_CASE("[security] needs both files, and refuses keys that are not keys", "[integration][security]") {
  testing::TempDir dir;
  std::ofstream(dir / "a.toml") << "[camera]\nwidth_px = 32\nheight_px = 32\npixel_type = \"u16\"\n"
                                   "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 8\n"
                                   "[security]\nserver_key_file = \"k.key\"\n";
  testing::ChildProcess one(SLOPECASTD_PATH, {"--check-config", (dir / "a.toml").string()}, dir / "one.log");
  CHECK(one.wait(10s) == 1);
  CHECK_THAT(testing::read_log(dir / "one.log"), Catch::Contains("needs both"));
  std::ofstream(dir / "k.key") << "public = \"short\"\nsecret = \"also short\"\n";
  std::ofstream(dir / "c.toml") << "[[client]]\nname = \"x\"\npublic = \"y\"\nrole = \"admin\"\n";
  std::ofstream(dir / "b.toml") << "[camera]\nwidth_px = 32\nheight_px = 32\npixel_type = \"u16\"\n"
                                   "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 8\n"
                                   "[security]\nserver_key_file = \"k.key\"\nclients_file = \"c.toml\"\n";
  testing::ChildProcess two(SLOPECASTD_PATH, {"--check-config", (dir / "b.toml").string()}, dir / "two.log");
  CHECK(two.wait(10s) == 1);
  CHECK_THAT(testing::read_log(dir / "two.log"), Catch::Contains("40-character Z85 key"));
}

TEST_CASE("slopecast keys makes the pairs and the commands use them", "[integration][security][cli]") {
  testing::DaemonHarness h;
  auto keys = [&](const std::string& name) {
    testing::ChildProcess k(SLOPECAST_PATH, {"keys", (h.dir / name).string()}, h.dir / (name + ".log"));
    REQUIRE(k.wait(10s) == 0);
    CHECK_THAT(testing::read_log(h.dir / (name + ".log")), Catch::Contains("[[client]]"));
  };
  keys("daemon");
  keys("viewer");
  const auto server = std::get<io::CurveKeyPair>(io::read_key_file(h.dir / "daemon.key", true));
  const auto viewer = std::get<io::CurveKeyPair>(io::read_key_file(h.dir / "viewer.key", true));
  CHECK(std::get<io::CurveKeyPair>(io::read_key_file(h.dir / "viewer.pub", false)).secret_z85.empty());
  CHECK((fs::status(h.dir / "viewer.key").permissions() & fs::perms::others_read) == fs::perms::none);
  std::ofstream(h.dir / "clients.toml") << "[[client]]\nname = \"viewer\"\npublic = \"" << viewer.public_z85
                                        << "\"\nrole = \"read\"\n";
  h.curve = as_client(server, viewer);
  REQUIRE(h.start("[camera]\nwidth_px = 32\nheight_px = 32\npixel_type = \"u16\"\n"
                  "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 8\n"
                  "[security]\nserver_key_file = \"daemon.key\"\nclients_file = \"clients.toml\"\n"));
  const std::vector<std::string> with_keys = {"--control", h.control_endpoint, "--client-key",
                                              (h.dir / "viewer.key").string(), "--server-key",
                                              (h.dir / "daemon.pub").string()};
  auto run = [&](std::vector<std::string> args, const std::string& log) {
    args.insert(args.end(), with_keys.begin(), with_keys.end());
    testing::ChildProcess c(SLOPECAST_PATH, args, h.dir / log);
    return c.wait(20s);
  };
  CHECK(run({"status"}, "status.log") == 0);
  CHECK_THAT(testing::read_log(h.dir / "status.log"), Catch::Contains("slopecastd"));
  CHECK(run({"centroider", "--method", "wcog"}, "switch.log") == 1);
  CHECK_THAT(testing::read_log(h.dir / "switch.log"), Catch::Contains("may only read"));
  CHECK(h.stop(5s) == 0);
}

// Several sensors on one network: three daemons, each fed by its own
// simulated camera, over tcp loopback; one subscriber receives all three
// streams and tells them apart by the sensor name every measurement
// carries; `slopecast watch` follows the three at once, a line per sensor.
#include <catch2/catch.hpp>

#include <netinet/in.h>
#include <sys/socket.h>
#include <unistd.h>

#include <map>

#include "slopecast/v1/measurement.pb.h"
#include "tests/integration/daemon_harness.h"

using namespace slopecast;
using namespace std::chrono_literals;

namespace {

// A TCP port on 127.0.0.1 that is free now (the kernel's choice).
int free_port() {
  const int fd = ::socket(AF_INET, SOCK_STREAM, 0);
  sockaddr_in a{};
  a.sin_family = AF_INET;
  a.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
  a.sin_port = 0;
  REQUIRE(::bind(fd, reinterpret_cast<sockaddr*>(&a), sizeof a) == 0);
  socklen_t len = sizeof a;
  ::getsockname(fd, reinterpret_cast<sockaddr*>(&a), &len);
  ::close(fd);
  return ntohs(a.sin_port);
}

std::string tcp(int port) { return "tcp://127.0.0.1:" + std::to_string(port); }

}  // namespace

TEST_CASE("three daemons, three cameras, one subscriber that tells the streams apart", "[integration][sensors]") {
  const std::vector<std::string> names = {"wfs-north", "wfs-south", "wfs-truth"};
  const std::vector<int> frames = {40, 50, 60};
  std::vector<std::unique_ptr<testing::DaemonHarness>> daemons;
  for (const auto& name : names) {
    auto h = std::make_unique<testing::DaemonHarness>();
    h->frames_endpoint = tcp(free_port());
    h->measurements_endpoint = tcp(free_port());
    h->control_endpoint = tcp(free_port());
    REQUIRE(h->start("[camera]\nwidth_px = 64\nheight_px = 64\npixel_type = \"u16\"\n"
                     "[lenslet_grid]\nsubapertures_x = 8\nsubapertures_y = 8\npitch_px = 8\n"
                     "[daemon]\nframe_queue_depth = 100\nsensor_name = \"" + name + "\"\n"));
    daemons.push_back(std::move(h));
  }
  // One SUB socket connected to all three measurement endpoints.
  zmq::context_t ctx(1);
  zmq::socket_t sub(ctx, zmq::socket_type::sub);
  sub.set(zmq::sockopt::linger, 0);
  sub.set(zmq::sockopt::subscribe, "");
  for (const auto& h : daemons) sub.connect(h->measurements_endpoint);
  for (const auto& h : daemons) REQUIRE(h->wait_for_subscribers(1));
  // And `slopecast watch` on the three configs.
  std::vector<std::string> watch_args = {"watch", "--count", "150", "--duration-s", "60"};
  for (const auto& h : daemons) {
    watch_args.push_back("--config");
    watch_args.push_back((h->dir / "slopecastd.toml").string());
  }
  testing::ChildProcess watch(SLOPECAST_PATH, watch_args, daemons[0]->dir / "watch.log");
  for (const auto& h : daemons) REQUIRE(h->wait_for_subscribers(2));
  std::vector<std::unique_ptr<testing::ChildProcess>> cams;
  for (std::size_t k = 0; k < daemons.size(); ++k)
    cams.push_back(std::make_unique<testing::ChildProcess>(
        SLOPECAST_PATH,
        std::vector<std::string>{"sim", "--frames-out", daemons[k]->frames_endpoint, "--frames",
                                 std::to_string(frames[k]), "--rate-hz", "200", "--block-when-full",
                                 "--subapertures-x", "8", "--subapertures-y", "8", "--pitch-px", "8", "--source-id",
                                 "cam-" + names[k]},
        daemons[k]->dir / "sim.log"));
  std::map<std::string, int> got;
  const auto deadline = std::chrono::steady_clock::now() + 60s;
  int total = 0;
  while (total < 150 && std::chrono::steady_clock::now() < deadline) {
    zmq::pollitem_t item{sub.handle(), 0, ZMQ_POLLIN, 0};
    if (zmq::poll(&item, 1, std::chrono::milliseconds(200)) <= 0) continue;
    zmq::message_t m;
    (void)sub.recv(m);
    v1::Measurement meas;
    REQUIRE(meas.ParseFromArray(m.data(), static_cast<int>(m.size())));
    ++got[meas.sensor_name()];
    ++total;
  }
  for (auto& c : cams) CHECK(c->wait(30s) == 0);
  for (std::size_t k = 0; k < names.size(); ++k) {
    INFO(names[k]);
    CHECK(got[names[k]] == frames[k]);
    CHECK(daemons[k]->status().sensor_name() == names[k]);
  }
  CHECK(got.size() == 3);
  REQUIRE(watch.wait(30s) == 0);
  const std::string said = testing::read_log(daemons[0]->dir / "watch.log");
  INFO(said);
  for (std::size_t k = 0; k < names.size(); ++k)
    CHECK_THAT(said, Catch::Contains("[" + names[k] + "] summary: " + std::to_string(frames[k]) + " measurements"));
}

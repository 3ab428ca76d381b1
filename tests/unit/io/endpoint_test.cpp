// Endpoint strings: one check for the daemon's config and every client.
#include <catch2/catch.hpp>

#include "daemon/io/daemon_config.h"
#include "daemon/io/endpoint.h"

using namespace slopecast;

TEST_CASE("well-formed endpoints pass", "[endpoint]") {
  for (const char* e : {"tcp://127.0.0.1:10140", "tcp://localhost:1", "tcp://*:65535", "tcp://[::1]:10141",
                        "ipc:///tmp/slopecast-frames", "inproc://frames"})
    CHECK(io::validate_endpoint(e).empty());
}

TEST_CASE("malformed endpoints get a sentence that names them", "[endpoint]") {
  CHECK_THAT(io::validate_endpoint("127.0.0.1:6112"), Catch::Contains("has no scheme") &&
                                                          Catch::Contains("tcp://127.0.0.1:6112"));
  CHECK_THAT(io::validate_endpoint("tcp://127.0.0.1"), Catch::Contains("has no port"));
  CHECK_THAT(io::validate_endpoint("tcp://127.0.0.1:"), Catch::Contains("has no port"));
  CHECK_THAT(io::validate_endpoint("tcp://:10140"), Catch::Contains("no host"));
  // 99999 would silently bind 34463 (99999 mod 65536) if passed to ZeroMQ.
  CHECK_THAT(io::validate_endpoint("tcp://127.0.0.1:99999"), Catch::Contains("outside 1..65535"));
  CHECK_THAT(io::validate_endpoint("tcp://127.0.0.1:0"), Catch::Contains("outside 1..65535"));
  CHECK_THAT(io::validate_endpoint("tcp://127.0.0.1:61x2"), Catch::Contains("not a number"));
  CHECK_THAT(io::validate_endpoint("udp://127.0.0.1:5"), Catch::Contains("not a ZeroMQ endpoint"));
  CHECK_THAT(io::validate_endpoint("ipc://"), Catch::Contains("no path"));
}

TEST_CASE("a host that does not resolve is a warning, not an error", "[endpoint]") {
  // ".invalid" is reserved never to resolve (RFC 2606).
  CHECK(io::validate_endpoint("tcp://camera.invalid:10140").empty());
  const auto w = io::endpoint_warnings("tcp://camera.invalid:10140");
  REQUIRE(w.size() == 1);
  CHECK_THAT(w[0], Catch::Contains("does not resolve"));
  CHECK(io::endpoint_warnings("tcp://127.0.0.1:10140").empty());
  CHECK(io::endpoint_warnings("tcp://*:10140").empty());
}

namespace {
const char* kBody =
    "[camera]\nwidth_px = 32\nheight_px = 32\npixel_type = \"u16\"\n"
    "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 8\n";

io::DaemonConfig parse_ok(const std::string& endpoints) {
  auto r = io::parse_daemon_config("[endpoints]\n" + endpoints + kBody, "t.toml", ".");
  INFO((std::holds_alternative<io::ConfigError>(r) ? std::get<io::ConfigError>(r).message : ""));
  REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
  return std::get<io::DaemonConfig>(r);
}
bool any_contains(const std::vector<std::string>& v, const std::string& s) {
  for (const auto& x : v)
    if (x.find(s) != std::string::npos) return true;
  return false;
}
}  // namespace

TEST_CASE("the config refuses or warns about endpoint mistakes before anything binds", "[endpoint][config]") {
  auto error_of = [](const std::string& endpoints) {
    auto r = io::parse_daemon_config("[endpoints]\n" + endpoints + kBody, "t.toml", ".");
    return std::holds_alternative<io::ConfigError>(r) ? std::get<io::ConfigError>(r).message : std::string();
  };
  CHECK_THAT(error_of("control = \"tcp://127.0.0.1\"\n"), Catch::Contains("control") && Catch::Contains("has no port"));
  CHECK_THAT(error_of("measurements_out = \"tcp://127.0.0.1:99999\"\n"), Catch::Contains("outside 1..65535"));
  CHECK_THAT(error_of("measurements_out = \"ipc:///tmp/x\"\ncontrol = \"ipc:///tmp/x\"\n"),
             Catch::Contains("must differ"));
  CHECK(any_contains(parse_ok("frames_in = \"tcp://127.0.0.1:10142\"\n").warnings, "listen to itself"));
  CHECK(any_contains(parse_ok("frames_in = \"inproc://frames\"\n").warnings, "inproc://"));
  CHECK(any_contains(parse_ok("frames_in = \"tcp://camera.invalid:10140\"\n").warnings, "does not resolve"));
  CHECK(any_contains(parse_ok("").warnings, "no dark_frame"));
}
